//! `paddock audit`: the security reviewer's report on one artifact.

use anyhow::Result;
use paddock_host::audit::{AuditReport, audit};
use paddock_host::limits::fmt_duration;

use crate::Outcome;
use crate::common::{ArtifactArgs, contract_text, print_json};

/// Report what an artifact is, who vouches for it, what it can touch, which
/// limits bind it, and how it behaves on its own checks under those limits.
/// Exits 1 when anything breaks the policy.
#[derive(clap::Args)]
pub struct Args {
    #[command(flatten)]
    target: ArtifactArgs,
}

/// Audits and prints; exit code follows the verdict.
pub fn run(args: Args) -> Result<Outcome> {
    let args = args.target;
    let report = audit(&args.artifact, args.load.size_cap(), &args.load.options(), &args.load.trust.policy()?);
    if args.json {
        print_json(&report)?;
    } else {
        out!("{}", text(&report))?;
    }
    Ok(if report.passed() { Outcome::Ok } else { Outcome::Failed })
}

fn text(r: &AuditReport) -> String {
    let mut out = format!("audit of {}\n", r.path.display());
    let mut line = |k: &str, v: String| out.push_str(&format!("  {k:<12} {v}\n"));
    line("digest", r.digest.map_or("unreadable".into(), |d| d.to_string()));
    line("size", format!("{} bytes", r.bytes));
    let voucher = r.trust.voucher.as_deref().map_or(String::new(), |v| format!(" (vouch by voucher {v})"));
    let why = match (r.trust.status, &r.trust.error) {
        ("unvouched", _) => ": not checked (no --trust or --pin given)".to_owned(),
        (_, Some(e)) => format!(": {e}"),
        _ => String::new(),
    };
    line("trust", format!("{}{voucher}{why}", r.trust.status));
    if let Some(s) = &r.inventory {
        line("imports", if s.imports.is_empty() { "none".into() } else { s.imports.join(", ") });
        line("exports", s.exports.join(", "));
        if let Some(p) = &r.wasi_policy {
            line(
                "wasi policy",
                format!(
                    "empty world; clocks {}, randomness {}, {} bytes of stdout/stderr kept per call",
                    source(p.clocks),
                    source(p.random),
                    p.output_bytes
                ),
            );
        }
        for w in &r.wasi {
            line("wasi", format!("{}: {}", w.interface, w.satisfied_by.as_deref().unwrap_or("not provided")));
        }
        for m in &s.memories {
            line(
                "memory",
                format!(
                    "{} initial, {} maximum ({})",
                    m.initial,
                    m.maximum.map_or("no".into(), |v| v.to_string()),
                    m.unit
                ),
            );
        }
        for t in &s.tables {
            line(
                "table",
                format!(
                    "{} initial, {} maximum ({})",
                    t.initial,
                    t.maximum.map_or("no".into(), |v| v.to_string()),
                    t.unit
                ),
            );
        }
        line("data", format!("{} segments, {} bytes", s.data_segments, s.data_bytes));
        for c in &s.sections {
            line("section", format!("{} ({} bytes)", c.name, c.bytes));
        }
    }
    if let Some(c) = &r.contract {
        line("model", format!("{} {}: {} features, {} outputs", c.name, c.version, c.features.len(), c.outputs.len()));
    }
    let l = &r.limits;
    line(
        "deadline",
        format!("{} per call, {} to start an instance", fmt_duration(l.deadline), fmt_duration(l.init_deadline)),
    );
    line("fuel", l.fuel.map_or("no limit (deadline only)".into(), |f| format!("{f} per call")));
    line("memory cap", format!("{} bytes", l.memory_bytes));
    line("table cap", format!("{} elements", l.table_elements));
    line("size cap", format!("{} bytes; rows per call {}", r.size_cap, l.rows_per_call));
    let e = &r.engine;
    line(
        "engine",
        format!(
            "wasmtime {}, stack {} bytes, NaNs {}, {} interruption, imports allowed: {}",
            e.wasmtime,
            e.stack_bytes,
            if e.canonical_nans { "canonical" } else { "as the hardware makes them" },
            e.interruption,
            e.imports_allowed
        ),
    );
    if let Some(p) = &r.probe {
        line(
            "probe",
            format!(
                "{}/{} checks passed (max abs error {:e}); peak memory {} bytes; {:.0} fuel and {:.2} µs per row",
                p.passed, p.cases, p.max_abs_error, p.peak_memory_bytes, p.fuel_per_row, p.micros_per_row
            ),
        );
    }
    line("profile", r.profile.clone().unwrap_or_else(|| "none: drift is unavailable".into()));
    if let Some(c) = &r.contract {
        out.push_str(&format!("\ncontract: {}\n", contract_text(c)));
    }
    if r.violations.is_empty() && r.trust.status == "unvouched" {
        out.push_str("verdict: passes its limits and checks; trust was not checked (give --trust or --pin)\n");
    } else if r.violations.is_empty() {
        out.push_str("verdict: passes\n");
    } else {
        let n = r.violations.len();
        out.push_str(&format!("verdict: {n} violation{}\n", if n == 1 { "" } else { "s" }));
        for v in &r.violations {
            out.push_str(&format!("  - {}\n", crate::flags::named(v)));
        }
    }
    out
}

fn source(s: paddock_host::sandbox::wasi::Ambient) -> &'static str {
    match s {
        paddock_host::sandbox::wasi::Ambient::Fixed => "fixed",
        paddock_host::sandbox::wasi::Ambient::Real => "real",
    }
}
