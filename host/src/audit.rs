//! The reviewer's report on one artifact: what it is, who vouches for it,
//! what it can touch, which limits bind it, and how it behaves when run
//! under those limits on its own checks.
//!
//! [`audit`] never fails: every problem becomes a line in
//! [`AuditReport::violations`], so one report shows all of them.

use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::artifact::digest::Digest;
use crate::artifact::trust::{Admission, TrustPolicy, Vouch};
use crate::artifact::{Artifact, Inventory, inspect_bytes};
use crate::contract::Contract;
use crate::limits::{Limits, fmt_duration};
use crate::sandbox::model::{LoadError, Model, ModelOptions};
use crate::sandbox::wasi::{self, WasiPolicy};
use crate::sandbox::{Runtime, RuntimeConfig};

/// Who vouches for the artifact.
#[derive(Clone, Debug, Serialize)]
pub struct TrustFinding {
    /// `vouched` (by a trusted voucher), `pinned`, `unvouched` (the policy
    /// requires nothing) or `refused`.
    pub status: &'static str,
    /// The voucher's id, when a vouch was present.
    pub voucher: Option<String>,
    /// Why the policy refused it.
    pub error: Option<String>,
}

/// What running the artifact's own checks under its limits showed.
#[derive(Clone, Debug, Serialize)]
pub struct Probe {
    /// Cases run.
    pub cases: usize,
    /// Cases that passed.
    pub passed: usize,
    /// Largest absolute error over the cases.
    pub max_abs_error: f64,
    /// Largest linear memory the instance reached, in bytes.
    pub peak_memory_bytes: u64,
    /// Fuel (instructions) per row, scoring all cases in one call.
    pub fuel_per_row: f64,
    /// Wall time per row, scoring all cases in one call, in µs.
    pub micros_per_row: f64,
}

/// The engine settings that bind every model, as a reviewer reads them.
#[derive(Clone, Debug, Serialize)]
pub struct EngineFacts {
    /// wasmtime release.
    pub wasmtime: &'static str,
    /// Stack limit, bytes.
    pub stack_bytes: usize,
    /// Whether NaNs are canonicalized.
    pub canonical_nans: bool,
    /// How the deadline is enforced.
    pub interruption: String,
    /// What the model may import.
    pub imports_allowed: String,
}

/// One WASI interface the artifact imports, and how the policy answers it.
#[derive(Clone, Debug, Serialize)]
pub struct WasiImport {
    /// The import, with its version (`wasi:cli/stdout@0.2.9`).
    pub interface: String,
    /// What the policy gives it; `None` when no policy is set or the
    /// interface is not one the host provides.
    pub satisfied_by: Option<String>,
}

/// The audit of one artifact.
#[derive(Clone, Debug, Serialize)]
pub struct AuditReport {
    /// The file.
    pub path: PathBuf,
    /// Its sha256, when it could be read.
    pub digest: Option<Digest>,
    /// Its size in bytes.
    pub bytes: u64,
    /// Who vouches for it.
    pub trust: TrustFinding,
    /// Imports, exports, memories, tables, data and custom sections.
    pub inventory: Option<Inventory>,
    /// The WASI policy the audit ran under, if any.
    pub wasi_policy: Option<WasiPolicy>,
    /// Every WASI interface imported, and what satisfies it.
    pub wasi: Vec<WasiImport>,
    /// The declared contract, when it loads.
    pub contract: Option<Contract>,
    /// The largest artifact file it was read under, in bytes.
    pub size_cap: u64,
    /// The limits that will bind each call.
    pub limits: Limits,
    /// The engine settings.
    pub engine: EngineFacts,
    /// Its checks, run under those limits.
    pub probe: Option<Probe>,
    /// What its training profile covers ("442 rows; 10 features, 1 output"),
    /// or `None` when it carries none (drift is then unavailable).
    pub profile: Option<String>,
    /// Everything that breaks the policy; empty means the artifact passes.
    pub violations: Vec<String>,
}

impl AuditReport {
    /// Whether the artifact passes: no violations.
    pub fn passed(&self) -> bool {
        self.violations.is_empty()
    }
}

/// Audits an artifact file, read under `size_cap` bytes, under the given
/// load options and trust policy. Reads `ARTIFACT.vouch` when it exists.
pub fn audit(path: &Path, size_cap: u64, options: &ModelOptions, policy: &TrustPolicy) -> AuditReport {
    let config = RuntimeConfig { fuel: true, ..RuntimeConfig::default() };
    let mut report = AuditReport {
        path: path.to_owned(),
        digest: None,
        bytes: 0,
        trust: TrustFinding { status: "refused", voucher: None, error: None },
        inventory: None,
        wasi_policy: options.wasi.clone(),
        wasi: Vec::new(),
        contract: None,
        profile: None,
        size_cap,
        limits: options.limits.clone(),
        engine: EngineFacts {
            wasmtime: crate::sandbox::wasmtime_version(),
            stack_bytes: config.stack_bytes,
            canonical_nans: config.canonical_nans,
            interruption: format!("epoch, {} tick", fmt_duration(crate::sandbox::TICK)),
            imports_allowed: match &options.wasi {
                None => "none".into(),
                Some(_) => format!("WASI {} only, over an empty world (WASI policy)", wasi::WASI_VERSION),
            },
        },
        probe: None,
        violations: Vec::new(),
    };
    let artifact = match Artifact::read(path, size_cap) {
        Ok(a) => a,
        Err(e) => {
            report.violations.push(e.to_string());
            return report;
        }
    };
    report.digest = Some(artifact.digest());
    report.bytes = artifact.bytes().len() as u64;
    report.inventory = inspect_bytes(artifact.bytes()).ok();
    for import in artifact.imports() {
        if !wasi::is_wasi(import) {
            report.violations.push(format!("imports `{import}`"));
            continue;
        }
        let satisfied_by = options.wasi.as_ref().and_then(|p| wasi::satisfied_by(import, p));
        match (&options.wasi, &satisfied_by) {
            (None, _) => report.violations.push(format!("imports `{import}` (WASI loads only under a WASI policy)")),
            (Some(_), None) => {
                report.violations.push(format!("imports `{import}`, which the WASI policy does not provide"))
            }
            _ => {}
        }
        report.wasi.push(WasiImport { interface: import.clone(), satisfied_by });
    }
    if options.wasi.is_none() && !report.wasi.is_empty() {
        report.violations.insert(
            0,
            format!(
                "needs the WASI policy: it imports {} WASI interface{} and loads only under the policy (audit it under a WASI policy, `ModelOptions::wasi`, to see what each gets)",
                report.wasi.len(),
                if report.wasi.len() == 1 { "" } else { "s" }
            ),
        );
    }
    trust(&mut report, path, &artifact, policy);

    let runtime = match Runtime::with_config(config) {
        Ok(r) => r,
        Err(e) => {
            report.violations.push(e.to_string());
            return report;
        }
    };
    // The checks run below, each case reported, not as a load failure.
    let model =
        match Model::load_with(&runtime, artifact, ModelOptions { skip_carried_checks: true, ..options.clone() }) {
            Ok(m) => m,
            Err(e) => {
                if !matches!(e, LoadError::Imports(_) | LoadError::WasiImports(_)) {
                    report.violations.push(format!("does not load: {e}"));
                }
                return report;
            }
        };
    report.contract = Some(model.contract().clone());
    report.profile = model
        .profile()
        .map(|p| format!("{} rows; {} features, {} outputs ({})", p.rows, p.features.len(), p.outputs.len(), p.source));
    probe(&mut report, &model);
    report
}

fn trust(report: &mut AuditReport, path: &Path, artifact: &Artifact, policy: &TrustPolicy) {
    let vouch_path = Vouch::path_for(path);
    let vouch = if vouch_path.exists() {
        match Vouch::read(&vouch_path) {
            Ok(s) => Some(s),
            Err(e) => {
                report.trust.error = Some(e.to_string());
                report.violations.push(e.to_string());
                return;
            }
        }
    } else {
        None
    };
    report.trust.voucher = vouch.as_ref().map(|v| v.voucher.clone());
    match policy.admit(artifact.digest(), vouch.as_ref()) {
        Ok(Admission::Vouch { .. }) => report.trust.status = "vouched",
        Ok(Admission::Pin) => report.trust.status = "pinned",
        Ok(Admission::OpenPolicy) => report.trust.status = "unvouched",
        Err(e) => {
            report.trust.error = Some(e.to_string());
            report.violations.push(e.to_string());
        }
    }
}

fn probe(report: &mut AuditReport, model: &Model) {
    let carried = match model.artifact().checks() {
        Ok(Some(c)) => c,
        Ok(None) => {
            report.violations.push("carries no checks: nothing shows it computes what its training computed".into());
            return;
        }
        Err(e) => {
            report.violations.push(e.to_string());
            return;
        }
    };
    let result = match model.run_checks(&carried) {
        Ok(r) => r,
        Err(e) => {
            report.violations.push(format!("its checks do not run: {e}"));
            return;
        }
    };
    if !result.ok() {
        report.violations.push(format!("{} of {} checks fail", result.cases - result.passed, result.cases));
    }
    // Cost: every valid case row in one call.
    let schema = model.schema();
    let mut cells = Vec::new();
    let rows =
        carried.cases.iter().enumerate().filter(|(i, c)| schema.encode_row(*i + 1, &c.row, &mut cells).is_ok()).count();
    let (mut fuel, mut micros, mut peak) = (0.0, 0.0, 0);
    if rows > 0 {
        match model.score_cells_unchecked(rows, &cells) {
            Ok(e) => {
                let u = e.usage();
                fuel = u.fuel.unwrap_or(0) as f64 / rows as f64;
                micros = u.wall.as_secs_f64() * 1e6 / rows as f64;
                peak = u.peak_memory_bytes;
            }
            Err(e) => report.violations.push(format!("scoring its checks in one call fails: {e}")),
        }
    }
    report.probe = Some(Probe {
        cases: result.cases,
        passed: result.passed,
        max_abs_error: result.max_abs_error,
        peak_memory_bytes: peak,
        fuel_per_row: fuel,
        micros_per_row: micros,
    });
}
