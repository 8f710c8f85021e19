//! The project's build step, run as `cargo xtask <task>`:
//!
//! - `build`: installs the `wasm32-unknown-unknown` target if missing,
//!   builds every guest in `models/`, trains the demo models, packs the
//!   artifacts into `target/paddock/artifacts/`, and assembles the demo
//!   store (several versions of each model, and routes) in
//!   `target/paddock/store/`. Guests are always built from source; no
//!   compiled guest is committed.
//! - `demo`: only what the demo serves — the two generic guests, the
//!   trainer, the demo store — then `paddock demo` on it.
//! - `guests`: the guests in other languages. Installs the pinned Python
//!   packages (pip) and the JavaScript build tools (`npm ci`), builds the
//!   Python and JavaScript `charge-taper` guests and the WASI probe with
//!   componentize-py and componentize-js, and packs them (under a WASI
//!   policy) with SciPy's reference values as their checks.
//! - `deps`: checks that the libraries an embedder links pull in none of
//!   the command's crates, that the core (`paddock-host`: artifact,
//!   contract, sandbox) pulls in none of the serving half's (Parquet,
//!   Redis, NATS, HTTP…), that no two modules of a library depend on
//!   each other (`modules.rs`), and that no two public types of the
//!   libraries share a name (`names.rs`).
//! - `test`: `deps`, `build` and `guests`; exports scikit-learn's reference models;
//!   then every test in the workspace (benchmarks run once each, as tests),
//!   every example, the HTTP API against schemathesis and an
//!   OpenMetrics parser (`tests/api/check_api.py`), and the README's walk
//!   from a notebook to a served store for each toolkit (`tests/docs/readme_walk.py`).
//! - `fuzz [SECONDS]`: after `test` (which builds the demo artifacts and
//!   exports the toolkits' model files the seeds come from), builds the
//!   libFuzzer targets in `fuzz/` (plain cargo with coverage flags; no
//!   cargo-fuzz, no sanitizer), then runs each for SECONDS (default 30),
//!   seeded with those artifacts and files and sample rows. Any crash fails
//!   the task.
//!
//! Anything after the task name is passed on to the command it ends with.

use std::ffi::OsString;
use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{Context, Result, bail};

mod modules;
mod names;
mod setup;
mod testrun;

/// Guests: (package, library file stem).
const GUESTS: [(&str, &str); 7] = [
    ("charge-minutes", "charge_minutes"),
    ("overstay-risk", "overstay_risk"),
    ("paddock-model-linear", "paddock_model_linear"),
    ("paddock-model-trees", "paddock_model_trees"),
    ("paddock-model-program", "paddock_model_program"),
    ("paddock-model-onnx", "paddock_model_onnx"),
    ("charge-taper", "charge_taper"),
];
const TARGET: &str = "wasm32-unknown-unknown";
/// Guests built optimised for size (see the `wasm-small` profile).
const SMALL: [&str; 1] = ["paddock-model-onnx"];
const SMALL_PROFILE: &str = "wasm-small";

fn main() -> Result<()> {
    let mut args = std::env::args().skip(1);
    let task = args.next().unwrap_or_else(|| "help".into());
    let rest: Vec<String> = args.collect();
    let root = root()?;
    match task.as_str() {
        "build" => build(&root).map(drop),
        "demo" => {
            // Only the guests the demo store is packed with: the others
            // (the ONNX evaluator above all) take most of a full build.
            ensure_target()?;
            let guests = build_guests(&root, &DEMO_GUESTS)?;
            let tools = tools(&root)?;
            guests.finish()?;
            let out = root.join("target/paddock");
            let train = out.join("train");
            std::fs::create_dir_all(&train).with_context(|| format!("creating {}", train.display()))?;
            train_demo(&tools, &train)?;
            demo_store(&root, &tools, &out.join("guests"), &train.join("store"), &out.join("store"))?;
            let store = out.join("store");
            let mut cmd = Command::new(&tools.paddock);
            cmd.arg("demo").arg("--store").arg(&store).args(&rest);
            run(cmd)
        }
        "guests" => {
            let tools = build(&root)?;
            setup::python_packages(&root)?;
            setup::npm_tools(&root)?;
            foreign_guests(&root, &tools)
        }
        "test" => test(&root, &rest),
        "deps" => deps(&root),
        "fuzz-build" => build_fuzz_targets(&root).map(drop),
        "fuzz" => {
            let seconds: u64 = rest.first().map(|s| s.parse()).transpose().context("fuzz SECONDS")?.unwrap_or(30);
            fuzz(&root, seconds)
        }
        _ => {
            eprintln!("usage: cargo xtask <build|demo|guests|test|deps|fuzz|fuzz-build> [args for the final command]");
            if task == "help" { Ok(()) } else { bail!("unknown task `{task}`") }
        }
    }
}

fn root() -> Result<PathBuf> {
    let manifest = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    Ok(manifest.parent().context("xtask lives in the workspace")?.to_owned())
}

/// `cargo xtask test`: set-up first (system packages, the wasm32 target;
/// PyPI and npm packages on a thread of their own), then the code's shape
/// (fmt, library dependencies and module cycles, clippy), then the build,
/// the toolkits' reference exports, every test binary, the examples, and
/// the HTTP API against outside tools. Prints how long each step took.
fn test(root: &Path, rest: &[String]) -> Result<()> {
    let mut steps = Steps::new();
    setup::system_packages()?;
    ensure_target()?;
    let packages = setup::start_packages(root);
    steps.done("set-up (system packages, wasm32 target)");
    let mut fmt = cargo(root);
    fmt.args(["fmt", "--all", "--check"]);
    run(fmt).context("the code is not formatted: run `cargo fmt --all`")?;
    deps(root)?;
    steps.done("fmt, library dependencies, module cycles");
    // The guests build in a target directory of their own, much of it one
    // long single-threaded link (the ONNX evaluator): it runs beside the
    // host's build. Clippy is not a step of its own: every native build of
    // the workspace's crates goes through clippy's driver (see
    // [`cargo_linted`]), so lints are checked while the code compiles.
    let guests = build_guests(root, &GUESTS)?;
    let tools = finish_build(root, guests)?;
    steps.done("build, linted by clippy: guests, paddock, demo training and store");
    let pmml_python = packages.finish()?;
    steps.done("PyPI and npm packages (waited for)");
    foreign_guests(root, &tools)?;
    steps.done("Python and JavaScript guests");
    // scikit-learn's reference models and predictions, for tests/sklearn.rs,
    // XGBoost's and LightGBM's, for tests/imports.rs, and pyarrow's
    // Parquet tables, for tests/tables.rs; PMML from nyoka, which needs the
    // scikit-learn of its day, for tests/pmml.rs, and shap's contributions
    // of those documents' trees (shap needs today's numpy).
    for (python, script, out) in [
        (Path::new("python3"), "tests/sklearn/export.py", "target/paddock/sklearn"),
        (Path::new("python3"), "tests/imports/export.py", "target/paddock/imports"),
        (Path::new("python3"), "tests/tables/export.py", "target/paddock/tables"),
        (Path::new("python3"), "tests/cells/export.py", "target/paddock/cells"),
        (pmml_python.as_path(), "tests/pmml/export.py", "target/paddock/pmml"),
        (Path::new("python3"), "tests/pmml/contributions.py", "target/paddock/pmml"),
    ] {
        let mut export = Command::new(python);
        export.arg(root.join(script)).arg(root.join(out));
        run(export)?;
    }
    steps.done("reference exports (scikit-learn, XGBoost, LightGBM, pyarrow, h3, nyoka, shap)");
    // The ONNX evaluator is a guest: built for wasm32 above, and tested
    // through the sandbox (tests/sklearn.rs); compiling tract natively
    // as well would only cost minutes.
    let mut args = vec!["--workspace", "--all-targets", "--exclude", "paddock-model-onnx"];
    args.extend(rest.iter().map(String::as_str));
    let jobs = std::env::var("PADDOCK_TEST_JOBS").ok().and_then(|j| j.parse().ok()).unwrap_or(TEST_JOBS);
    testrun::run_all(root, &args, jobs)?;
    steps.done("test binaries");
    // The crates' doc examples (the embedder's paths in the crate docs)
    // compile and run; built with the workspace's features, as the tests.
    let mut doc = cargo_linted(root);
    doc.args(["test", "--quiet", "--doc", "--workspace", "--exclude", "paddock-model-onnx"]);
    run(doc)?;
    steps.done("doc examples");
    // Examples must run as-is, not just compile. Built for the whole
    // workspace, as the tests were, so that they share every dependency
    // the tests built (`cargo run -p paddock-examples` alone resolves other
    // features and rebuilt wasmtime: 171 s on a clean clone).
    let mut build = cargo_linted(root);
    build.args(["build", "--quiet", "--workspace", "--exclude", "paddock-model-onnx", "--examples"]);
    run(build)?;
    let target = std::env::var_os("CARGO_TARGET_DIR").map_or_else(|| root.join("target"), PathBuf::from);
    for example in ["embed", "checked", "limits", "store", "service"] {
        let mut cmd = Command::new(target.join("debug/examples").join(example));
        cmd.current_dir(root);
        run(cmd)?;
    }
    steps.done("examples");
    api_check(root, &tools)?;
    steps.done("HTTP API against schemathesis and the OpenMetrics parser");
    readme_walk(root, &tools)?;
    steps.done("the README's notebook-to-store walk, per toolkit");
    shared_walk(root, &tools)?;
    steps.done("docs/shared-store.md's walk from one laptop to many hosts");
    steps.report();
    Ok(())
}

/// Test binaries run at once by default (`PADDOCK_TEST_JOBS` overrides):
/// on two cores, three keep both busy while one binary waits on a server.
const TEST_JOBS: usize = 3;

/// How long each step of a task took.
struct Steps {
    last: std::time::Instant,
    done: Vec<(&'static str, std::time::Duration)>,
}

impl Steps {
    fn new() -> Steps {
        Steps { last: std::time::Instant::now(), done: Vec::new() }
    }

    fn done(&mut self, step: &'static str) {
        let now = std::time::Instant::now();
        let took = now - self.last;
        self.done.push((step, took));
        self.last = now;
        eprintln!("xtask: {step}: {:.0} s", took.as_secs_f64());
    }

    fn report(&self) {
        eprintln!("xtask: where the time went:");
        for (step, took) in &self.done {
            eprintln!("  {:>6.0} s  {step}", took.as_secs_f64());
        }
    }
}

fn cargo(root: &Path) -> Command {
    let mut cmd = Command::new(std::env::var("CARGO").unwrap_or_else(|_| "cargo".into()));
    cmd.current_dir(root);
    cmd
}

/// `cargo` for a native build of the workspace's own crates, compiled by
/// clippy's driver with warnings denied (what `cargo clippy -- -D warnings`
/// sets up, on a build that also generates code): the lints cost a little
/// on top of the build instead of a second, check-only build of every
/// dependency (about ten minutes of CI on two cores). Dependencies are
/// compiled by rustc as usual. Every native build xtask starts goes through
/// here, so that they share their artifacts; a plain `cargo build` or
/// `cargo nextest` afterwards recompiles the workspace's crates (not the
/// dependencies) once.
fn cargo_linted(root: &Path) -> Command {
    let mut cmd = cargo(root);
    cmd.env("RUSTC_WORKSPACE_WRAPPER", "clippy-driver");
    cmd.env("CLIPPY_ARGS", "-D__CLIPPY_HACKERY__warnings__CLIPPY_HACKERY__");
    cmd
}

fn run(mut cmd: Command) -> Result<()> {
    let status = cmd.status().with_context(|| format!("starting {cmd:?}"))?;
    if !status.success() {
        bail!("{cmd:?} failed with {status}");
    }
    Ok(())
}

/// Adds the wasm32 target through rustup when it is not installed.
fn ensure_target() -> Result<()> {
    let out = Command::new("rustup").args(["target", "list", "--installed"]).output();
    match out {
        Ok(o) if String::from_utf8_lossy(&o.stdout).lines().any(|l| l.trim() == TARGET) => Ok(()),
        Ok(_) => {
            eprintln!("xtask: installing the {TARGET} target");
            run({
                let mut c = Command::new("rustup");
                c.args(["target", "add", TARGET]);
                c
            })
        }
        Err(e) => {
            eprintln!("xtask: rustup not found ({e}); assuming the {TARGET} target is installed");
            Ok(())
        }
    }
}

/// The guests the demo store is packed with.
const DEMO_GUESTS: [(&str, &str); 2] =
    [("paddock-model-linear", "paddock_model_linear"), ("paddock-model-trees", "paddock_model_trees")];

/// Where guests are built: a target directory of their own, so that their
/// build runs beside the host's instead of waiting for its lock.
const GUEST_TARGET_DIR: &str = "target/guests";

/// A guest build running in the background; [`GuestBuild::finish`] waits
/// for it and copies the guests to `target/paddock/guests/`.
struct GuestBuild<'a> {
    root: PathBuf,
    guests: &'a [(&'a str, &'a str)],
    children: Vec<(std::process::Child, String)>,
}

/// Starts building `guests` for wasm32 (one cargo per profile).
fn build_guests<'a>(root: &Path, guests: &'a [(&'a str, &'a str)]) -> Result<GuestBuild<'a>> {
    let mut children = Vec::new();
    for profile in ["wasm", SMALL_PROFILE] {
        let packages: Vec<&str> =
            guests.iter().map(|(p, _)| *p).filter(|p| (profile == SMALL_PROFILE) == SMALL.contains(p)).collect();
        if packages.is_empty() {
            continue;
        }
        let mut cmd = cargo(root);
        cmd.env("CARGO_TARGET_DIR", root.join(GUEST_TARGET_DIR));
        cmd.args(["build", "--quiet", "--profile", profile, "--target", TARGET]);
        for package in packages {
            cmd.args(["-p", package]);
        }
        let child = cmd.spawn().with_context(|| format!("starting {cmd:?}"))?;
        children.push((child, format!("{cmd:?}")));
    }
    Ok(GuestBuild { root: root.to_owned(), guests, children })
}

/// A guest build given up on (a step before it failed) is stopped, not
/// left running after the task ends.
impl Drop for GuestBuild<'_> {
    fn drop(&mut self) {
        for (child, _) in &mut self.children {
            let _ = child.kill();
            let _ = child.wait();
        }
    }
}

impl GuestBuild<'_> {
    fn finish(mut self) -> Result<()> {
        for (mut child, what) in std::mem::take(&mut self.children) {
            let status = child.wait().with_context(|| format!("waiting for {what}"))?;
            if !status.success() {
                bail!("{what} failed with {status}");
            }
        }
        let dir = self.root.join("target/paddock/guests");
        std::fs::create_dir_all(&dir).with_context(|| format!("creating {}", dir.display()))?;
        for (package, stem) in self.guests {
            let profile = if SMALL.contains(package) { SMALL_PROFILE } else { "wasm" };
            let built = self.root.join(format!("{GUEST_TARGET_DIR}/{TARGET}/{profile}/{stem}.wasm"));
            let copy = dir.join(format!("{package}.wasm"));
            std::fs::copy(&built, &copy).with_context(|| format!("copying {}", built.display()))?;
        }
        Ok(())
    }
}

/// The `paddock` command and the demo trainer, built once in one cargo
/// invocation (one feature set: separate `cargo run`s of each would build
/// wasmtime twice).
struct Tools {
    paddock: PathBuf,
    trainer: PathBuf,
}

fn tools(root: &Path) -> Result<Tools> {
    let mut cmd = cargo_linted(root);
    cmd.args(["build", "--quiet", "-p", "paddock-cli", "-p", "paddock-train-demo", "--bins"]);
    run(cmd)?;
    let target = std::env::var_os("CARGO_TARGET_DIR").map_or_else(|| root.join("target"), PathBuf::from);
    let exe = |name: &str| target.join("debug").join(format!("{name}{}", std::env::consts::EXE_SUFFIX));
    Ok(Tools { paddock: exe("paddock"), trainer: exe("paddock-train-demo") })
}

/// Trains the demo models into `train`.
fn train_demo(tools: &Tools, train: &Path) -> Result<()> {
    let mut trainer = Command::new(&tools.trainer);
    trainer.arg(train);
    run(trainer)
}

fn build(root: &Path) -> Result<Tools> {
    ensure_target()?;
    finish_build(root, build_guests(root, &GUESTS)?)
}

/// The rest of [`build`] once the guests are building: the command and the
/// trainer, then the guests copied out, the demo trained, and the demo
/// artifacts and store packed.
fn finish_build(root: &Path, guest_build: GuestBuild<'_>) -> Result<Tools> {
    let tools = tools(root)?;
    guest_build.finish()?;
    let out = root.join("target/paddock");
    let guests = out.join("guests");
    let train = out.join("train");
    let artifacts = out.join("artifacts");
    for dir in [&train, &artifacts] {
        std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    }
    train_demo(&tools, &train)?;
    for model in ["charge-minutes", "overstay-risk"] {
        let mut pack = Command::new(&tools.paddock);
        pack.arg("pack");
        pack.arg(guests.join(format!("{model}.wasm")));
        pack.arg("--params").arg(train.join(format!("{model}.params")));
        pack.arg("--checks").arg(train.join(format!("{model}.checks.json")));
        pack.arg("--out").arg(artifacts.join(format!("{model}.wasm")));
        run(pack)?;
    }
    demo_store(root, &tools, &guests, &train.join("store"), &out.join("store"))?;
    Ok(tools)
}

/// Packs the demo store's versions (params carrying their own contract,
/// checks and training profile) with the generic guests, and copies its
/// routes file.
fn demo_store(root: &Path, tools: &Tools, guests: &Path, trained: &Path, store: &Path) -> Result<()> {
    for (model, guest) in [("charge-minutes", "paddock-model-trees"), ("overstay-risk", "paddock-model-linear")] {
        let dir = store.join(model);
        std::fs::create_dir_all(&dir).with_context(|| format!("creating {}", dir.display()))?;
        let mut versions: Vec<String> = std::fs::read_dir(trained.join(model))
            .with_context(|| format!("reading {}", trained.join(model).display()))?
            .filter_map(|e| e.ok()?.file_name().to_str()?.strip_suffix(".params").map(str::to_owned))
            .collect();
        versions.sort();
        for version in versions {
            let mut pack = Command::new(&tools.paddock);
            pack.arg("pack");
            pack.arg(guests.join(format!("{guest}.wasm")));
            pack.arg("--params").arg(trained.join(model).join(format!("{version}.params")));
            pack.arg("--checks").arg(trained.join(model).join(format!("{version}.checks.json")));
            pack.arg("--profile").arg(trained.join(model).join(format!("{version}.profile.json")));
            pack.arg("--out").arg(dir.join(format!("{version}.wasm")));
            run(pack)?;
        }
    }
    let routes = root.join("models/train-demo/routes.toml");
    std::fs::copy(&routes, store.join("routes.toml")).with_context(|| format!("copying {}", routes.display()))?;
    // The features plan and the tables the trainer wrote.
    std::fs::create_dir_all(store.join("tables"))?;
    for table in ["sites.csv", "members.csv", "grid.csv"] {
        let from = trained.join("tables").join(table);
        std::fs::copy(&from, store.join("tables").join(table))
            .with_context(|| format!("copying {}", from.display()))?;
    }
    let features = root.join("models/train-demo/features.toml");
    std::fs::copy(&features, store.join("features.toml")).with_context(|| format!("copying {}", features.display()))?;
    Ok(())
}

/// Python guests: (source directory, module, artifact name, carries the
/// charge-taper params and checks).
const PYTHON_GUESTS: [(&str, &str, &str, bool); 2] = [
    ("models/charge-taper/python", "charge_taper", "charge-taper-py", true),
    ("tests/guests", "wasi_probe", "wasi-probe", false),
];

/// Builds the guests written in Python and JavaScript into
/// `target/paddock/artifacts/`: componentize-py and componentize-js make
/// the components, `paddock pack --wasi` adds the params and SciPy's
/// reference values as checks, and runs them.
fn foreign_guests(root: &Path, tools: &Tools) -> Result<()> {
    let out = root.join("target/paddock");
    let components = out.join("components");
    let reference = out.join("reference");
    std::fs::create_dir_all(&components).with_context(|| format!("creating {}", components.display()))?;
    let params = root.join("models/charge-taper/params.json");
    let mut refs = Command::new("python3");
    refs.arg(root.join("tests/guests/taper_reference.py")).arg(&params).arg(&reference);
    run(refs)?;

    let scripts = Command::new("python3")
        .args(["-c", "import sysconfig; print(sysconfig.get_path('scripts'))"])
        .output()
        .context("asking python3 where pip puts scripts")?;
    let componentize_py = PathBuf::from(String::from_utf8_lossy(&scripts.stdout).trim()).join("componentize-py");
    for (dir, module, name, _) in PYTHON_GUESTS {
        let mut c = Command::new(&componentize_py);
        c.current_dir(root).args([
            "--wit-path",
            "wit",
            "--world",
            "estimator",
            "componentize",
            module,
            "-p",
            dir,
            "-o",
        ]);
        c.arg(components.join(format!("{name}.wasm")));
        run(c).context("componentize-py (pip install componentize-py==0.25.1)")?;
    }

    let npm_dir = setup::npm_dir(root);
    let js = root.join("models/charge-taper/js");
    let mut c = Command::new("node");
    c.current_dir(root).arg(npm_dir.join("node_modules/@bytecodealliance/componentize-js/src/cli.js"));
    c.arg(js.join("charge-taper.js")).args(["--wit", "wit", "--world-name", "estimator"]);
    // No outbound HTTP and no incoming-request handler: the JavaScript
    // engine then imports only stdio, clocks, random and (empty) files.
    c.args(["--disable", "http", "fetch-event", "-o"]).arg(components.join("charge-taper-js.wasm"));
    run(c).context("componentize-js")?;

    let artifacts = out.join("artifacts");
    let checks = reference.join("charge-taper.checks.json");
    let taper = PYTHON_GUESTS.iter().filter(|g| g.3).map(|g| g.2).chain(["charge-taper-js"]);
    let os = |s: &str| OsString::from(s);
    for name in taper {
        let args = vec![os("--wasi"), os("--params"), params.clone().into(), os("--checks"), checks.clone().into()];
        pack_with(tools, &components.join(format!("{name}.wasm")), args, &artifacts.join(format!("{name}.wasm")))?;
    }
    // The Rust version of the same model (its params compiled in), with the
    // same checks: the baseline the others are measured against.
    let rust = out.join("guests/charge-taper.wasm");
    pack_with(tools, &rust, vec![os("--checks"), checks.clone().into()], &artifacts.join("charge-taper-rs.wasm"))?;
    pack_with(tools, &components.join("wasi-probe.wasm"), vec![os("--wasi")], &artifacts.join("wasi-probe.wasm"))
}

/// `paddock pack INPUT ARGS --out OUT`.
fn pack_with(tools: &Tools, input: &Path, args: Vec<OsString>, out: &Path) -> Result<()> {
    let mut pack = Command::new(&tools.paddock);
    pack.arg("pack").arg(input).args(args);
    pack.arg("--out").arg(out);
    run(pack)
}

/// Crates only the `paddock` command needs, which no library an embedder
/// links may pull in.
const CLI_ONLY: [&str; 4] = ["clap", "indicatif", "tracing-subscriber", "anyhow"];

/// Crates only the serving half (`paddock-serve`: the store, feature
/// sources, surfaces) needs, which the core crate must not pull in.
const SERVING_ONLY: [&str; 9] =
    ["parquet", "arrow-array", "arrow-schema", "redis", "notify", "hdrhistogram", "arc-swap", "axum", "async-nats"];

/// Checks what each library links: neither `paddock-host` (the core: artifact,
/// contract, sandbox) nor `paddock-serve` without its default features links
/// any of [`CLI_ONLY`] (except `anyhow`, which wasmtime and wit-component use
/// for their own errors: a library must not depend on it directly), and the
/// core links none of [`SERVING_ONLY`].
fn library_deps(root: &Path) -> Result<()> {
    let tree = |package: &str, depth: Option<&str>| -> Result<Vec<String>> {
        let mut cmd = cargo(root);
        cmd.args(["tree", "-p", package, "--no-default-features", "-e", "normal", "--prefix", "none"]);
        if let Some(d) = depth {
            cmd.args(["--depth", d]);
        }
        let out = cmd.output().with_context(|| format!("starting {cmd:?}"))?;
        if !out.status.success() {
            bail!("{cmd:?} failed: {}", String::from_utf8_lossy(&out.stderr));
        }
        Ok(String::from_utf8_lossy(&out.stdout)
            .lines()
            .filter_map(|l| l.split_whitespace().next())
            .map(str::to_owned)
            .collect())
    };
    for (package, banned) in
        [("paddock-host", &[&CLI_ONLY[..], &SERVING_ONLY[..]].concat()), ("paddock-serve", &CLI_ONLY.to_vec())]
    {
        let all = tree(package, None)?;
        let direct = tree(package, Some("1"))?;
        let mut found: Vec<&str> =
            banned.iter().copied().filter(|c| *c != "anyhow" && all.iter().any(|n| n == c)).collect();
        if direct.iter().any(|n| n == "anyhow") {
            found.push("anyhow (as a direct dependency)");
        }
        if !found.is_empty() {
            bail!("{package} without default features links crates it must not: {}", found.join(", "));
        }
        eprintln!(
            "xtask: {package} links none of {} (anyhow only through wasmtime and wit-component)",
            banned.join(", ")
        );
    }
    Ok(())
}

/// The library crates whose modules must not depend on each other in a circle.
const LIBRARY_SOURCES: [&str; 3] = ["host/src", "serve/src", "import/src"];

/// The library crates whose public types must each have a name of their own.
const NAMED_SOURCES: [&str; 4] = ["host/src", "serve/src", "import/src", "guest-sdk/src"];

/// [`library_deps`], [`modules::check`] on each of [`LIBRARY_SOURCES`], and
/// [`names::check`] on [`NAMED_SOURCES`].
fn deps(root: &Path) -> Result<()> {
    library_deps(root)?;
    LIBRARY_SOURCES.iter().try_for_each(|src| modules::check(&root.join(src)))?;
    names::check(root, &NAMED_SOURCES)
}

/// The README's walk from a notebook to a served store, run as written for
/// XGBoost, LightGBM and scikit-learn (`tests/docs/readme_walk.py`).
fn readme_walk(root: &Path, tools: &Tools) -> Result<()> {
    let mut walk = Command::new("python3");
    // A toolkit's warning (scikit-learn's "X does not have valid feature names") fails the walk.
    walk.args(["-W", "error::UserWarning"]).arg(root.join("tests/docs/readme_walk.py")).arg(&tools.paddock);
    walk.current_dir(root);
    run(walk)
}

/// docs/shared-store.md's walk, run as written against a NATS server of
/// its own (`tests/docs/shared_walk.py`).
fn shared_walk(root: &Path, tools: &Tools) -> Result<()> {
    let mut walk = Command::new("python3");
    walk.arg(root.join("tests/docs/shared_walk.py")).arg(&tools.paddock);
    walk.current_dir(root);
    run(walk)
}

/// The HTTP API against outside tools (`tests/api/check_api.py`):
/// schemathesis on the served OpenAPI document, and the OpenMetrics parser
/// on `/metrics`.
fn api_check(root: &Path, tools: &Tools) -> Result<()> {
    let mut check = Command::new("python3");
    check.arg(root.join("tests/api/check_api.py"));
    check.arg(&tools.paddock).arg(root.join("target/paddock/store")).arg("50");
    run(check)
}

/// The flags that make a libFuzzer target: coverage counters and
/// comparison tracing for libFuzzer to steer by (what cargo-fuzz passes,
/// minus its sanitizer), `cfg(fuzzing)`, and the checks a debug build has.
const FUZZ_RUSTFLAGS: &str = "-Cpasses=sancov-module -Cllvm-args=-sanitizer-coverage-level=4 \
    -Cllvm-args=-sanitizer-coverage-inline-8bit-counters -Cllvm-args=-sanitizer-coverage-pc-table \
    -Cllvm-args=-sanitizer-coverage-trace-compares --cfg fuzzing -Cdebug-assertions -Coverflow-checks";

/// Builds the fuzz targets (`fuzz/`, a workspace of its own) with plain
/// cargo and [`FUZZ_RUSTFLAGS`], for the host's target triple so that build
/// scripts and proc macros are not instrumented; returns the directory the
/// binaries are in. Needs no cargo-fuzz, and no sanitizer: the code under
/// test is safe Rust (see `fuzz/Cargo.toml`).
fn build_fuzz_targets(root: &Path) -> Result<PathBuf> {
    let out = Command::new("rustc").arg("-vV").output().context("asking rustc for the host triple")?;
    let info = String::from_utf8_lossy(&out.stdout);
    let host = info.lines().find_map(|l| l.strip_prefix("host: ")).context("rustc -vV names no host")?.trim();
    let flags = FUZZ_RUSTFLAGS.split_whitespace().collect::<Vec<_>>().join(" ");
    let mut build = cargo(&root.join("fuzz"));
    build.env("RUSTFLAGS", flags).args(["build", "--quiet", "--bins", "--target", host]);
    run(build)?;
    Ok(root.join("fuzz/target").join(host).join("debug"))
}

/// Runs every fuzz target for a bounded time, from seeds.
fn fuzz(root: &Path, seconds: u64) -> Result<()> {
    let seeds = root.join("target/paddock/fuzz-seeds");
    let artifact_seeds = seeds.join("artifact");
    let row_seeds = seeds.join("rows");
    let import_seeds = seeds.join("import");
    for dir in [&artifact_seeds, &row_seeds, &import_seeds] {
        std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    }
    for model in ["charge-minutes", "overstay-risk"] {
        let from = root.join(format!("target/paddock/artifacts/{model}.wasm"));
        std::fs::copy(&from, artifact_seeds.join(format!("{model}.wasm")))
            .with_context(|| format!("copying {} (run `cargo xtask test` first: it builds it)", from.display()))?;
    }
    std::fs::write(
        row_seeds.join("ndjson"),
        "{\"kw\": 11, \"hour\": 3, \"plug\": \"ccs2\", \"fleet\": true, \"id\": \"a\"}\n",
    )?;
    std::fs::write(row_seeds.join("csv"), "id,kw,hour,plug,fleet\na,11,3,ccs2,yes\nb,,x,,\n")?;
    // Small models the toolkits wrote (tests/imports/export.py, run by `xtask test`).
    for model in [
        "xgb-iris-softmax.json",
        "lgb-iris-one-vs-rest.txt",
        "lgb-wine-categorical.txt",
        "skl-diabetes-tree.onnx",
        "skl-iris-logistic.onnx",
        "skl-wine-hist.onnx",
    ] {
        let from = root.join("target/paddock/imports").join(model);
        std::fs::copy(&from, import_seeds.join(model)).with_context(|| {
            format!("copying {} (run `cargo xtask test` first: it exports the models)", from.display())
        })?;
    }
    // PMML documents: the hand-worked examples, which cover every construct read.
    for doc in ["dmg-golf-tree.pmml", "charge-session-minutes.pmml", "charge-overstay-vote.pmml"] {
        std::fs::copy(root.join("tests/pmml").join(doc), import_seeds.join(doc))
            .with_context(|| format!("copying tests/pmml/{doc}"))?;
    }
    let targets = build_fuzz_targets(root)?;
    // The targets run side by side, each for the same time, each into a
    // log of its own (printed whole if it fails, its final stats if not).
    let mut running = Vec::new();
    for (target, seed) in [("artifact", &artifact_seeds), ("rows", &row_seeds), ("import", &import_seeds)] {
        let log_path = root.join(format!("target/fuzz-{target}.log"));
        let log = std::fs::File::create(&log_path).with_context(|| format!("creating {}", log_path.display()))?;
        let mut c = Command::new(targets.join(target));
        c.arg(seed).args([&format!("-max_total_time={seconds}"), "-max_len=262144", "-print_final_stats=1"]);
        c.stdout(log.try_clone()?).stderr(log);
        running.push((target, log_path, c.spawn().with_context(|| format!("starting the {target} fuzz target"))?));
    }
    let mut failed = Vec::new();
    for (target, log_path, mut child) in running {
        let status = child.wait().with_context(|| format!("waiting for the {target} fuzz target"))?;
        let log = std::fs::read_to_string(&log_path).unwrap_or_default();
        if status.success() {
            let stats: Vec<&str> = log.lines().filter(|l| l.starts_with("stat::")).collect();
            eprintln!("xtask: fuzz target {target}: {}", stats.join(", "));
        } else {
            eprintln!("{log}");
            failed.push(format!("{target} ({status}, log {})", log_path.display()));
        }
    }
    if !failed.is_empty() {
        bail!("fuzz targets failed: {}", failed.join(", "));
    }
    Ok(())
}
