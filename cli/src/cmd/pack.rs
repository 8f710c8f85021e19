//! `paddock pack`: make an artifact from a component or core module.

use std::io::Write as _;
use std::path::PathBuf;

use anyhow::{Context, Result};
use paddock_host::{Artifact, Checks, sandbox::verify};
use paddock_import::{Format, Manifest};
use serde::Serialize;

use crate::Outcome;
use crate::common::{LoadArgs, WasiArgs, print_json};

/// Make an artifact: componentize a core module built for
/// wasm32-unknown-unknown (or take a component), add params and checks,
/// then load it and run its checks. A model file a toolkit saved (XGBoost
/// JSON, LightGBM text, a scikit-learn tree ensemble or linear model in
/// ONNX, PMML) is imported onto the trees, linear or program guest, its contract taken
/// from the file; any other ONNX model (`MODEL.onnx`) is packed with the
/// ONNX evaluator guest, its manifest giving the contract.
#[derive(clap::Args)]
pub struct Args {
    /// The component or core module to pack, a toolkit's model file
    /// (XGBoost `.json`, LightGBM `.txt`, PMML `.pmml`), or an ONNX model (`.onnx`).
    input: PathBuf,
    /// The model file's format, when it is not recognised from its content.
    #[arg(long, value_enum)]
    format: Option<ModelFormat>,
    /// Parameter blob to carry (the model decodes it in `init`).
    #[arg(long, value_name = "FILE", conflicts_with = "manifest")]
    params: Option<PathBuf>,
    /// For an ONNX model: its manifest (TOML: name, version, features,
    /// outputs). For a toolkit's model file: overrides of the contract it
    /// declares (name, version, and per feature or output its name,
    /// domain, unit, required-ness, bounds; see the README).
    #[arg(long, value_name = "FILE")]
    manifest: Option<PathBuf>,
    /// The guest that evaluates an imported or ONNX model [default: the
    /// trees, linear or program guest the import needs, or the ONNX evaluator, from
    /// target/paddock/guests/ where `cargo xtask build` leaves them].
    #[arg(long, value_name = "FILE")]
    evaluator: Option<PathBuf>,
    /// Checks to carry (JSON: example rows with recorded outputs).
    #[arg(long, value_name = "FILE")]
    checks: Option<PathBuf>,
    /// Where to write the artifact.
    #[arg(long, short, value_name = "FILE")]
    out: PathBuf,
    /// Do not load the result and run its checks.
    #[arg(long)]
    no_verify: bool,
    /// Print the result as JSON.
    #[arg(long)]
    json: bool,
    /// How the packed artifact is loaded to run its checks: with the
    /// library's default limits, and WASI only when asked.
    #[command(flatten)]
    wasi: WasiArgs,
}

/// Where `cargo xtask build` leaves the ONNX evaluator guest.
const DEFAULT_EVALUATOR: &str = "target/paddock/guests/paddock-model-onnx.wasm";
/// Where `cargo xtask build` leaves the guests imported models run on.
const GUESTS: &str = "target/paddock/guests";

/// A toolkit's model file format.
#[derive(Clone, Copy, clap::ValueEnum)]
enum ModelFormat {
    /// XGBoost's JSON model (`save_model("m.json")`).
    Xgboost,
    /// LightGBM's text model (`booster.save_model("m.txt")`).
    Lightgbm,
    /// An ONNX file holding a scikit-learn tree ensemble or linear model, as skl2onnx writes it.
    SklearnOnnx,
    /// A PMML 4.x document: a RegressionModel, TreeModel or MiningModel of them.
    Pmml,
}

impl From<ModelFormat> for Format {
    fn from(f: ModelFormat) -> Format {
        match f {
            ModelFormat::Xgboost => Format::XgboostJson,
            ModelFormat::Lightgbm => Format::LightgbmText,
            ModelFormat::SklearnOnnx => Format::SklearnOnnx,
            ModelFormat::Pmml => Format::Pmml,
        }
    }
}

#[derive(Serialize)]
struct Packed {
    artifact: PathBuf,
    digest: String,
    bytes: usize,
    model: Option<String>,
    checks: Option<paddock_host::CheckReport>,
}

/// Packs, then verifies unless told not to.
pub fn run(args: Args) -> Result<Outcome> {
    let read = |p: &PathBuf| std::fs::read(p).with_context(|| format!("reading {}", p.display()));
    let input = read(&args.input)?;
    let is_onnx = args.input.extension().is_some_and(|e| e.eq_ignore_ascii_case("onnx"));
    let format = args.format.map(Format::from).or_else(|| Format::recognise(&input));
    let mut origin = None;
    let (wasm, params) = match (&args.manifest, is_onnx) {
        _ if format.is_some() => {
            let format = format.expect("checked just above");
            let manifest = match &args.manifest {
                Some(p) => {
                    let text = std::fs::read_to_string(p).with_context(|| format!("reading {}", p.display()))?;
                    let evaluator_manifest =
                        is_onnx && text.lines().any(|l| l.trim_start().starts_with("[[features]]"));
                    Some(Manifest::from_toml(&text).with_context(|| {
                        if evaluator_manifest {
                            format!(
                                "in {}: {} holds a model paddock imports ({}), so --manifest takes overrides of its contract \
                                 (`[features.x0] name = \"…\"`; see the README), not an ONNX evaluator manifest",
                                p.display(),
                                args.input.display(),
                                format.name()
                            )
                        } else {
                            format!("in {}", p.display())
                        }
                    })?)
                }
                None => None,
            };
            anyhow::ensure!(
                args.params.is_none(),
                "--params is for WebAssembly input; {} is a {}",
                args.input.display(),
                format.name()
            );
            let imported =
                paddock_import::import(&input, format, &args.input.display().to_string(), manifest.as_ref())?;
            let evaluator = args
                .evaluator
                .clone()
                .unwrap_or_else(|| PathBuf::from(GUESTS).join(format!("{}.wasm", imported.guest())));
            let guest = read(&evaluator).with_context(|| {
                format!("the {} guest (build it with `cargo xtask build`, or pass --evaluator)", imported.guest())
            })?;
            origin = Some(imported.origin.to_map());
            (guest, Some(imported.params()))
        }
        (Some(manifest), true) => {
            let text = std::fs::read_to_string(manifest).with_context(|| format!("reading {}", manifest.display()))?;
            let params = paddock_import::onnx_graph::params(&text, &input)
                .with_context(|| format!("in {}", manifest.display()))?;
            let evaluator = args.evaluator.clone().unwrap_or_else(|| PathBuf::from(DEFAULT_EVALUATOR));
            let guest = read(&evaluator)
                .context("the ONNX evaluator guest (build it with `cargo xtask build`, or pass --evaluator)")?;
            (guest, Some(params))
        }
        (None, true) => anyhow::bail!("{}: an ONNX model needs its manifest (--manifest FILE)", args.input.display()),
        (Some(_), false) => anyhow::bail!(
            "--manifest is for ONNX models and toolkits' model files; {} is neither (it looks like {})",
            args.input.display(),
            paddock_import::looks_like(&input)
        ),
        (None, false) => {
            let text = std::str::from_utf8(&input).map(str::trim_start);
            let wat = text.is_ok_and(|t| t.starts_with('(') || t.starts_with(";;"));
            anyhow::ensure!(
                input.starts_with(b"\0asm") || wat,
                "{}: not WebAssembly, nor a model file paddock imports (XGBoost JSON, LightGBM text, ONNX, PMML); it looks like {}",
                args.input.display(),
                paddock_import::looks_like(&input)
            );
            (input, args.params.as_ref().map(read).transpose()?)
        }
    };
    let checks = match &args.checks {
        Some(p) => Some(Checks::from_json(&read(p)?).with_context(|| format!("in {}", p.display()))?),
        None => None,
    };
    let bytes = paddock_host::pack_imported(&wasm, params.as_deref(), checks.as_ref(), origin.as_ref())
        .with_context(|| format!("packing {}", args.input.display()))?;
    // Written beside its place under a temporary name, loaded and checked
    // from there, and renamed into place only if all of that succeeds: a
    // broken artifact is never left where it could be signed or served.
    let dir = match args.out.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_owned(),
        _ => PathBuf::from("."),
    };
    std::fs::create_dir_all(&dir).with_context(|| format!("creating {}", dir.display()))?;
    let mut tmp = tempfile::Builder::new()
        .prefix(".paddock-pack-")
        .suffix(".wasm")
        .tempfile_in(&dir)
        .with_context(|| format!("creating a temporary file in {}", dir.display()))?;
    tmp.write_all(&bytes)
        .and_then(|()| tmp.as_file().sync_all())
        .with_context(|| format!("writing {}", tmp.path().display()))?;
    let artifact = Artifact::from_bytes(bytes, u64::MAX)?;
    let mut packed = Packed {
        artifact: args.out.clone(),
        digest: artifact.digest().to_string(),
        bytes: artifact.bytes().len(),
        model: None,
        checks: None,
    };
    let not_written = || format!("{} was not written", args.out.display());
    if !args.no_verify {
        let load = LoadArgs { wasi: args.wasi.clone(), ..LoadArgs::default() };
        let (_runtime, model) = load
            .load(tmp.path())
            .map_err(|e| e.context("the packed artifact does not load"))
            .with_context(not_written)?;
        packed.model = Some(format!("{} {}", model.contract().name, model.contract().version));
        if let Some(checks) = &checks {
            let report = verify::run(&model, checks).with_context(not_written)?;
            if !report.ok() {
                let first = report.failures.first().map(|(i, f)| format!("; first: case {i}: {f}")).unwrap_or_default();
                anyhow::bail!(
                    "{}: {} of {} checks fail{first}",
                    not_written(),
                    report.cases - report.passed,
                    report.cases
                );
            }
            packed.checks = Some(report);
        }
    }
    tmp.persist(&args.out)
        .map_err(|e| e.error)
        .with_context(|| format!("moving the artifact into {}", args.out.display()))?;
    if args.json {
        print_json(&packed)?;
    } else {
        outln!("wrote {} ({} bytes, {})", packed.artifact.display(), packed.bytes, packed.digest)?;
        if let Some(m) = &packed.model {
            outln!("loads as {m}")?;
        }
        if let Some(r) = &packed.checks {
            outln!(
                "checks: {}/{} passed (max abs error {:e}, max rel error {:e})",
                r.passed,
                r.cases,
                r.max_abs_error,
                r.max_rel_error
            )?;
        }
    }
    Ok(Outcome::Ok)
}
