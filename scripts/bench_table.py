#!/usr/bin/env python3
"""Writes BENCHMARKS.md from criterion's estimates of the `scoring` bench.

Run after `cargo bench -p paddock-tests --bench scoring`. Reads
target/criterion/<group>/<bench>/new/estimates.json (median, in ns per
iteration) and writes per-row costs and sandbox/native ratios measured in
the same run, with the machine they came from.
"""
import json
import os
import platform
import subprocess
import sys
from datetime import date

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
CRIT = os.path.join(ROOT, "target", "criterion")
BATCH = 1024


def median_ns(group, bench):
    path = os.path.join(CRIT, group, bench, "new", "estimates.json")
    with open(path) as f:
        return json.load(f)["median"]["point_estimate"]


def cpu():
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def main():
    rows = []
    checks = []
    for group, targets in (("linear", 0.35), ("trees", 0.8)):
        warm = median_ns(group, "single_warm")
        fresh = median_ns(group, "single_fresh")
        native_single = median_ns(group, "native_single")
        batch = median_ns(group, f"batch/{BATCH}") / BATCH
        loose = median_ns(group, f"batch_nans_as_is/{BATCH}") / BATCH
        native = median_ns(group, f"native/{BATCH}") / BATCH
        ratio = native / batch
        loose_ratio = native / loose
        rows.append(
            f"| {group} | {warm / 1000:.2f} µs | {fresh / 1000:.2f} µs | {native_single:.0f} ns "
            f"| {batch:.2f} ns | {native:.2f} ns | {ratio:.2f}× | {loose:.2f} ns ({loose_ratio:.2f}×) |"
        )
        checks.append((group, ratio, targets, warm, fresh))
    rustc = subprocess.run(["rustc", "--version"], capture_output=True, text=True).stdout.strip()
    out = [
        "# Benchmarks",
        "",
        "Scoring cost, sandboxed against native evaluation of the same params, measured in one run of",
        "`cargo bench -p paddock-tests --bench scoring` and tabulated by `python3 scripts/bench_table.py`.",
        "Medians of criterion's samples. Linear: 9 features, 1 output. Trees: 200 trees of depth 6 over",
        "9 features (random, seeded).",
        "",
        f"Machine: {cpu()}, {os.cpu_count()} cores, {platform.system()} {platform.release()}; {rustc};",
        f"wasmtime 48.0.8; measured {date.today().isoformat()}. One run on a shared machine: treat",
        "differences under ~10 % as noise.",
        "",
        "| model | single row, warm (end to end) | single row, fresh instance | native single row | batch of 1024, per row | native, per row | batch throughput vs native | batch per row without NaN canonicalization (vs native) |",
        "|---|---|---|---|---|---|---|---|",
        *rows,
        "",
        "\"End to end\" is `Model::score` with one typed row: validate against the contract, encode,",
        "call into the sandbox, check the outputs. \"Fresh instance\" adds instantiation, `init(params)`",
        "and a `describe()` check of the contract on every call (pooling allocator, pre-instantiated).",
        "Native columns run the same estimator code (`paddock-guest`) on the same dense cells.",
        "",
        "Targets from issue 2 and where this run stands:",
        "",
    ]
    for group, ratio, target, warm, fresh in checks:
        out.append(f"- {group} batch throughput ≥ {target}× native: {ratio:.2f}× — {'met' if ratio >= target else 'not met'}")
    for group, ratio, target, warm, fresh in checks:
        out.append(f"- {group} warm single row p50 ≤ 1 µs: {warm / 1000:.2f} µs — {'met' if warm <= 1000 else 'not met'}")
        out.append(f"- {group} fresh single row p50 ≤ 10 µs: {fresh / 1000:.2f} µs — {'met' if fresh <= 10000 else 'not met'}")
    out.append("")
    notes = os.path.join(ROOT, "scripts", "bench_notes.md")
    if os.path.exists(notes):
        with open(notes) as f:
            out.append(f.read().rstrip())
            out.append("")
    with open(os.path.join(ROOT, "BENCHMARKS.md"), "w") as f:
        f.write("\n".join(out))
    print("\n".join(out))


if __name__ == "__main__":
    sys.exit(main())
