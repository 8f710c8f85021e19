//! Drift reports drawn for people: each field's index, level and notes,
//! then its training and live shares bin by bin as bars side by side.

use paddock_host::DriftReport;

/// A drift report for people (`live` names what was counted): per field its index and level, any notes,
/// then each bin's training and live shares as bars side by side.
pub fn drift_text(report: &DriftReport, live: &str) -> String {
    const WIDTH: f64 = 30.0;
    let bar = |share: f64| "█".repeat((share * WIDTH).round() as usize);
    let mut out = format!("\ndrift against the training profile (training | {live}):\n");
    for f in &report.fields {
        let index = f.index.map_or("-".to_owned(), |i| format!("{i:.3}"));
        out.push_str(&format!("\n{} {}: index {index}, {} ({} values)\n", f.kind, f.name, f.level, f.count));
        for note in &f.notes {
            out.push_str(&format!("  note: {note}\n"));
        }
        let width = f.bins.iter().map(|b| b.chars().count()).max().unwrap_or(0);
        for ((name, e), l) in f.bins.iter().zip(&f.expected).zip(&f.live) {
            let pad = " ".repeat(width - name.chars().count());
            let line = format!("  {name}{pad} {:>5.1} % {:<30} | {:>5.1} % {}", e * 100.0, bar(*e), l * 100.0, bar(*l));
            out.push_str(line.trim_end());
            out.push('\n');
        }
    }
    out
}
