//! `paddock pack`: make an artifact from a component or core module.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use paddock_host::{Checks, PackError, Parts, Profile, pack_verified};
use paddock_import::{Format, InputKind, Overrides, onnx_graph};

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
    /// What the input is, when its content does not say (`onnx-graph` sends an ONNX file an importer
    /// would read to the ONNX evaluator instead).
    #[arg(long, value_enum)]
    format: Option<ModelFormat>,
    /// Parameter blob to carry (the model decodes it in `init`); for WebAssembly input.
    #[arg(long, value_name = "FILE", conflicts_with_all = ["manifest", "overrides"])]
    params: Option<PathBuf>,
    /// For an ONNX graph: its manifest (TOML: name, version, features,
    /// outputs, and the graph input and outputs they map to; see docs/models.md).
    #[arg(long, value_name = "FILE", conflicts_with = "overrides")]
    manifest: Option<PathBuf>,
    /// For a toolkit's model file: changes to the contract it declares
    /// (TOML: name, version, and per feature or output its name, domain,
    /// unit, required-ness, bounds; see docs/models.md).
    #[arg(long, value_name = "FILE")]
    overrides: Option<PathBuf>,
    /// The model's name in its contract (an imported model or ONNX graph; over the overrides' or manifest's).
    #[arg(long, value_name = "NAME")]
    name: Option<String>,
    /// The model's version in its contract, semver (an imported model or ONNX graph; over the overrides' or
    /// manifest's).
    #[arg(long = "version", value_name = "SEMVER")]
    model_version: Option<String>,
    /// The guest that evaluates an imported or ONNX model [default: the
    /// trees, linear or program guest the import needs, or the ONNX evaluator, from
    /// target/paddock/guests/ where `cargo xtask build` leaves them].
    #[arg(long, value_name = "FILE")]
    evaluator: Option<PathBuf>,
    /// Checks to carry (JSON: example rows with recorded outputs).
    #[arg(long, value_name = "FILE")]
    checks: Option<PathBuf>,
    /// A training profile to carry (JSON the notebook helper writes: how
    /// the training rows were spread), for drift reports.
    #[arg(long, value_name = "FILE")]
    profile: Option<PathBuf>,
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

/// What the input is, as `--format` names it.
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
    /// Any ONNX graph, run by the ONNX evaluator guest (needs --manifest).
    OnnxGraph,
}

impl From<ModelFormat> for InputKind {
    fn from(f: ModelFormat) -> InputKind {
        match f {
            ModelFormat::Xgboost => InputKind::Toolkit(Format::XgboostJson),
            ModelFormat::Lightgbm => InputKind::Toolkit(Format::LightgbmText),
            ModelFormat::SklearnOnnx => InputKind::Toolkit(Format::SklearnOnnx),
            ModelFormat::Pmml => InputKind::Toolkit(Format::Pmml),
            ModelFormat::OnnxGraph => InputKind::OnnxGraph,
        }
    }
}

/// Packs, then verifies unless told not to; writes the artifact only if both succeed.
pub fn run(args: Args) -> Result<Outcome> {
    let input = read(&args.input)?;
    let file = args.input.display().to_string();
    let kind = InputKind::identify(&input, &file, args.format.map(InputKind::from))?;
    refuse_flags(&args, kind, &file)?;
    let checks = match &args.checks {
        Some(p) => Some(Checks::from_json(&read(p)?).with_context(|| format!("in {}", p.display()))?),
        None => None,
    };
    let profile = match &args.profile {
        Some(p) => Some(Profile::from_json(&read(p)?).with_context(|| format!("in {}", p.display()))?),
        None => None,
    };
    let (wasm, params, origin, (checks, profile)) = match kind {
        InputKind::Toolkit(format) => imported(&args, &input, &file, format, (checks, profile))?,
        InputKind::OnnxGraph => {
            let (guest, params) = graph(&args, &input, &file)?;
            (guest, Some(params), None, (checks, profile))
        }
        InputKind::WebAssembly => (input, args.params.as_deref().map(read).transpose()?, None, (checks, profile)),
        _ => anyhow::bail!("{file}: {} is not packed by this version", kind.described()),
    };
    let parts = Parts {
        wasm: &wasm,
        params: params.as_deref(),
        checks: checks.as_ref(),
        origin: origin.as_ref(),
        profile: profile.as_ref(),
    };
    let load = LoadArgs { wasi: args.wasi.clone(), ..LoadArgs::default() };
    let runtime = if args.no_verify { None } else { Some(load.runtime()?) };
    let packed =
        pack_verified(&args.out, parts, runtime.as_ref().map(|r| (r, load.options()))).map_err(|e| match e {
            PackError::Pack(_) => anyhow::Error::new(e).context(format!("packing {file}")),
            other => other.into(),
        })?;
    if args.json {
        print_json(&packed)?;
    } else {
        print(&packed)?;
    }
    Ok(Outcome::Ok)
}

/// What goes into the artifact: the guest, its params, the importer's origin record, the checks
/// and the profile.
type Pieces = (Vec<u8>, Option<Vec<u8>>, Option<serde_json::Map<String, serde_json::Value>>, Carried);

/// The checks and the training profile an artifact carries.
type Carried = (Option<Checks>, Option<Profile>);

/// Refuses the flags that do not belong to this kind of input, saying which kind takes them.
fn refuse_flags(args: &Args, kind: InputKind, file: &str) -> Result<()> {
    let refuse = |flag: &str, wants: &str| anyhow::anyhow!("{flag} is for {wants}; {file} is {}", kind.described());
    let named = args.name.is_some() || args.model_version.is_some();
    match kind {
        InputKind::Toolkit(_) if args.manifest.is_some() => {
            Err(refuse("--manifest", "ONNX graphs (a toolkit's model file takes --overrides)"))
        }
        InputKind::OnnxGraph | InputKind::WebAssembly if args.overrides.is_some() => {
            Err(refuse("--overrides", "toolkits' model files"))
        }
        InputKind::WebAssembly if args.manifest.is_some() => Err(refuse("--manifest", "ONNX graphs")),
        InputKind::Toolkit(_) | InputKind::OnnxGraph if args.params.is_some() => {
            Err(refuse("--params", "WebAssembly input"))
        }
        InputKind::WebAssembly if named => {
            Err(refuse("--name and --version", "imported models and ONNX graphs (WebAssembly declares its own)"))
        }
        _ => Ok(()),
    }
}

/// A toolkit's model file imported with the overrides (and `--name`, `--version`), its checks
/// and profile renamed as the overrides rename the contract (the origin says so), on the guest it
/// needs.
fn imported(args: &Args, input: &[u8], file: &str, format: Format, (checks, profile): Carried) -> Result<Pieces> {
    let mut overrides = match &args.overrides {
        Some(p) => Overrides::from_toml(&read_text(p)?).with_context(|| format!("in {}", p.display()))?,
        None => Overrides::default(),
    };
    overrides.name = args.name.clone().or(overrides.name);
    overrides.version = args.model_version.clone().or(overrides.version);
    let mut imported = paddock_import::import(input, format, file, Some(&overrides))?;
    let (features, outputs) = (overrides.feature_renames(), overrides.output_renames());
    if (checks.is_some() || profile.is_some()) && !(features.is_empty() && outputs.is_empty()) {
        let pairs: Vec<String> = features.iter().chain(&outputs).map(|(a, b)| format!("{a} → {b}")).collect();
        let part = match (&checks, &profile) {
            (Some(_), Some(_)) => "checks and profile",
            (Some(_), None) => "checks",
            _ => "profile",
        };
        imported.origin.contract.push(paddock_import::Provenance {
            part: part.into(),
            from: format!(
                "recorded with the file's names, renamed as the overrides rename them ({})",
                pairs.join(", ")
            ),
        });
    }
    let checks = checks.map(|c| c.renamed(&features, &outputs));
    let profile = profile.map(|p| p.renamed(&features, &outputs));
    let guest = evaluator(args, &Path::new(GUESTS).join(format!("{}.wasm", imported.guest())), imported.guest())?;
    Ok((guest, Some(imported.params()), Some(imported.origin.to_map()), (checks, profile)))
}

/// An ONNX graph framed with its manifest (`--name` and `--version` over the manifest's), on the
/// ONNX evaluator guest: (guest, params).
fn graph(args: &Args, input: &[u8], file: &str) -> Result<(Vec<u8>, Vec<u8>)> {
    let path = args
        .manifest
        .as_ref()
        .with_context(|| format!("{file}: an ONNX graph needs its manifest (--manifest FILE)"))?;
    let mut manifest =
        onnx_graph::read_manifest(&read_text(path)?).with_context(|| format!("in {}", path.display()))?;
    manifest.name = args.name.clone().unwrap_or(manifest.name);
    manifest.version = args.model_version.clone().unwrap_or(manifest.version);
    let params = onnx_graph::params(&manifest, input)?;
    Ok((evaluator(args, Path::new(DEFAULT_EVALUATOR), "ONNX evaluator")?, params))
}

/// The artifact written, how it loads, and its checks.
fn print(packed: &paddock_host::Packed) -> Result<()> {
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
    Ok(())
}

fn read(path: &Path) -> Result<Vec<u8>> {
    std::fs::read(path).with_context(|| format!("reading {}", path.display()))
}

fn read_text(path: &Path) -> Result<String> {
    std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))
}

/// The guest an imported model or ONNX graph runs on: `--evaluator`, or where `cargo xtask build` leaves it.
fn evaluator(args: &Args, default: &Path, name: &str) -> Result<Vec<u8>> {
    let path = args.evaluator.as_deref().unwrap_or(default);
    read(path).with_context(|| format!("the {name} guest (build it with `cargo xtask build`, or pass --evaluator)"))
}
