//! Runs the workspace's test binaries — unit, integration, and benchmarks
//! once each as tests — several at a time, so that one binary waiting on a
//! server or a child process leaves the cores to another. Each binary runs
//! as `cargo test` would run it (from its package's directory, with its
//! package's variables); its output goes to `target/paddock/test-logs/`,
//! and is printed whole when it fails. At the end, one line per binary
//! says how long it took, longest first.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};

use crate::cargo_linted;

/// One test binary, as cargo built it.
struct Binary {
    /// `package/target` (the target's kind when it is not a test: `lib`, `bench`…).
    label: String,
    executable: PathBuf,
    package_dir: PathBuf,
    package_name: String,
}

/// Builds the test binaries with `cargo test --no-run ARGS` and returns them.
fn build(root: &Path, args: &[&str]) -> Result<Vec<Binary>> {
    let mut cmd = cargo_linted(root);
    cmd.args(["test", "--no-run", "--message-format=json-render-diagnostics"]).args(args);
    // Only stdout is taken (the JSON messages): cargo's progress and its
    // rendered errors go to stderr, where CI's log shows them.
    cmd.stdout(Stdio::piped()).stderr(Stdio::inherit());
    let out = cmd.spawn().and_then(|child| child.wait_with_output()).with_context(|| format!("starting {cmd:?}"))?;
    if !out.status.success() {
        bail!("{cmd:?} failed with {} (cargo's errors are printed above)", out.status);
    }
    let mut binaries = Vec::new();
    for line in String::from_utf8_lossy(&out.stdout).lines() {
        let Ok(message) = serde_json::from_str::<serde_json::Value>(line) else { continue };
        if message["reason"] != "compiler-artifact" {
            continue;
        }
        // Test-mode builds only: the plain binaries integration tests run
        // (`CARGO_BIN_EXE_*`) are reported too, and are not tests.
        if message["profile"]["test"] != true {
            continue;
        }
        let Some(executable) = message["executable"].as_str() else { continue };
        let target = &message["target"];
        let kind = target["kind"][0].as_str().unwrap_or("?");
        let manifest = PathBuf::from(message["manifest_path"].as_str().context("cargo names the manifest")?);
        let package_dir = manifest.parent().context("a manifest lives in a directory")?.to_owned();
        let package_name = package_name(&message["package_id"]);
        let name = target["name"].as_str().unwrap_or("?");
        let label = match kind {
            "test" => format!("{package_name}/{name}"),
            _ => format!("{package_name}/{name} ({kind})"),
        };
        binaries.push(Binary { label, executable: executable.into(), package_dir, package_name });
    }
    Ok(binaries)
}

/// The name in a package id: `path+file:///…/cli#paddock-cli@0.1.0` →
/// `paddock-cli`; `path+file:///…/overstay-risk#0.1.0` (a package named as
/// its directory) → `overstay-risk`.
fn package_name(id: &serde_json::Value) -> String {
    let id = id.as_str().unwrap_or("?");
    let (url, fragment) = id.rsplit_once('#').unwrap_or((id, ""));
    match fragment.split_once('@') {
        Some((name, _)) => name.to_owned(),
        None => url.rsplit('/').next().unwrap_or(url).to_owned(),
    }
}

/// The order binaries start in, longest first as last measured (a clean
/// clone, `.ci/run`), so that no long one is left to run alone at the end;
/// binaries not named start after these, in cargo's order.
const ORDER: [&str; 13] = [
    "paddock-tests/guests",
    "paddock-tests/wasi",
    "paddock-tests/prime",
    "paddock-cli/cli",
    "paddock-tests/registry",
    "paddock-cli/workers",
    "paddock-tests/sklearn",
    "paddock-tests/malformed",
    "paddock-tests/guests (bench)",
    "paddock-tests/imports",
    "paddock-tests/http",
    "paddock-tests/workers",
    "paddock-tests/sources",
];

/// Binaries that wait for others: these compile and prime the same Python
/// and JavaScript models (tens of megabytes of code each) into the shared
/// test code cache, so each waits until the binaries that first compile
/// what it loads are done, instead of compiling it at the same time (run
/// side by side, `prime` and the guests bench took 330 s and 242 s on a
/// clean clone; one after the other, 143 s and 50 s).
const AFTER: [(&str, &[&str]); 2] = [
    ("paddock-tests/prime", &["paddock-tests/guests", "paddock-tests/wasi"]),
    ("paddock-tests/guests (bench)", &["paddock-tests/guests", "paddock-tests/prime"]),
];

/// The binaries in the order they should start.
fn ordered(mut binaries: Vec<Binary>) -> Vec<Binary> {
    binaries.sort_by_key(|b| ORDER.iter().position(|c| *c == b.label).unwrap_or(ORDER.len()));
    binaries
}

/// Whether `binary` may start: every binary it waits for has finished, or
/// is not part of this run.
fn may_start(binary: &Binary, waiting: &[Binary], running: &[Running]) -> bool {
    let Some((_, before)) = AFTER.iter().find(|(label, _)| *label == binary.label) else { return true };
    !before.iter().any(|b| waiting.iter().any(|w| w.label == *b) || running.iter().any(|r| r.binary.label == *b))
}

/// A binary running, with where its output goes.
struct Running {
    binary: Binary,
    child: Child,
    log: PathBuf,
    started: Instant,
}

/// Builds the test binaries (`cargo test --no-run ARGS`) and runs them, at
/// most `jobs` at a time. Fails after all have run when any failed.
pub fn run_all(root: &Path, args: &[&str], jobs: usize) -> Result<()> {
    let binaries = build(root, args)?;
    let logs = root.join("target/paddock/test-logs");
    std::fs::create_dir_all(&logs).with_context(|| format!("creating {}", logs.display()))?;
    eprintln!("xtask: running {} test binaries, {jobs} at a time (output in {})", binaries.len(), logs.display());
    let mut waiting = ordered(binaries);
    let mut running: Vec<Running> = Vec::new();
    let mut took: Vec<(String, Duration, bool)> = Vec::new();
    while !waiting.is_empty() || !running.is_empty() {
        while running.len() < jobs.max(1) {
            let Some(next) = waiting.iter().position(|b| may_start(b, &waiting, &running)) else { break };
            let binary = waiting.remove(next);
            running.push(start(binary, &logs)?);
        }
        let mut finished = None;
        for (i, r) in running.iter_mut().enumerate() {
            if let Some(status) = r.child.try_wait().with_context(|| format!("waiting for {}", r.binary.label))? {
                finished = Some((i, status.success()));
                break;
            }
        }
        let Some((i, ok)) = finished else {
            std::thread::sleep(Duration::from_millis(50));
            continue;
        };
        let r = running.swap_remove(i);
        let elapsed = r.started.elapsed();
        let summary = summary(&r.log);
        if ok {
            eprintln!("xtask: ok     {:<44} {:>7.1} s  {summary}", r.binary.label, elapsed.as_secs_f64());
        } else {
            let output = std::fs::read_to_string(&r.log).unwrap_or_default();
            eprintln!("{output}");
            eprintln!(
                "xtask: FAILED {:<44} {:>7.1} s  (output above, and in {})",
                r.binary.label,
                elapsed.as_secs_f64(),
                r.log.display()
            );
        }
        took.push((r.binary.label, elapsed, ok));
    }
    took.sort_by_key(|t| std::cmp::Reverse(t.1));
    eprintln!("xtask: test binaries by time:");
    for (label, elapsed, ok) in &took {
        eprintln!("  {:>7.1} s  {label}{}", elapsed.as_secs_f64(), if *ok { "" } else { "  FAILED" });
    }
    let failed: Vec<&str> = took.iter().filter(|t| !t.2).map(|t| t.0.as_str()).collect();
    if !failed.is_empty() {
        bail!("{} test binaries failed: {}", failed.len(), failed.join(", "));
    }
    Ok(())
}

/// Starts one binary as `cargo test` would: in its package's directory,
/// with `CARGO_MANIFEST_DIR` and `CARGO_PKG_NAME` set.
fn start(binary: Binary, logs: &Path) -> Result<Running> {
    let log = logs.join(format!("{}.log", binary.label.replace(['/', ' ', '(', ')'], "_")));
    let out = std::fs::File::create(&log).with_context(|| format!("creating {}", log.display()))?;
    let err = out.try_clone()?;
    let mut cmd = Command::new(&binary.executable);
    cmd.current_dir(&binary.package_dir)
        .env("CARGO_MANIFEST_DIR", &binary.package_dir)
        .env("CARGO_PKG_NAME", &binary.package_name)
        .stdin(Stdio::null())
        .stdout(out)
        .stderr(err);
    let child = cmd.spawn().with_context(|| format!("starting {}", binary.executable.display()))?;
    Ok(Running { binary, child, log, started: Instant::now() })
}

/// The binary's `test result:` totals, summed over its lines.
fn summary(log: &Path) -> String {
    let text = std::fs::read_to_string(log).unwrap_or_default();
    let (mut passed, mut ignored) = (0u64, 0u64);
    for line in text.lines().filter(|l| l.starts_with("test result:")) {
        let count = |word: &str| {
            line.split(';').find_map(|part| {
                part.trim().strip_suffix(word).and_then(|n| n.trim().rsplit(' ').next()?.parse::<u64>().ok())
            })
        };
        passed += count("passed").unwrap_or(0);
        ignored += count("ignored").unwrap_or(0);
    }
    if text.contains("test result:") {
        format!("{passed} passed, {ignored} ignored")
    } else {
        "(no libtest summary)".into()
    }
}
