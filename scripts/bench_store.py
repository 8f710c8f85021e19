#!/usr/bin/env python3
"""Runs the `store` bench several times and writes its section of BENCHMARKS.md.

    python3 scripts/bench_store.py [RUNS]      (default 3; needs `cargo xtask build` first)

Each run is `cargo bench -p paddock-tests --bench store`. Ratios (cold/warm
open, registry/direct scoring) are taken within each run; the section reports
the median over runs with the range. The section sits between the markers
below and replaces the previous one; `bench_table.py` keeps it.
"""
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_table import ROOT, cpu, med, median_ns, run_bench, write_section  # noqa: E402

START = "<!-- store-bench -->"
END = "<!-- /store-bench -->"


def one_run():
    run_bench("store", 1)
    return {
        "cold": median_ns("store_open", "cold"),
        "warm": median_ns("store_open", "warm"),
        "model": median_ns("route", "model_single"),
        "registry": median_ns("route", "registry_single"),
    }


def main():
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 3
    runs = []
    for i in range(n):
        print(f"run {i + 1}/{n}", file=sys.stderr)
        runs.append(one_run())
    m = {k: med([r[k] for r in runs]) for k in runs[0]}
    speedups = sorted(r["cold"] / r["warm"] for r in runs)
    overheads = sorted(r["registry"] - r["model"] for r in runs)
    section = [
        START,
        "## Store: restart with a warm code cache, and the cost of routing",
        "",
        f"`python3 scripts/bench_store.py {n}`: {n} runs of `cargo bench -p paddock-tests --bench store`;",
        f"medians over runs, ranges in brackets. Machine: {cpu()}, {os.cpu_count()} cores.",
        "",
        "| what | time |",
        "|---|---|",
        f"| open the demo store (6 versions), empty code cache: compile + gate + checks | {m['cold'] / 1e6:.1f} ms |",
        f"| open the same store, warm code cache | {m['warm'] / 1e6:.1f} ms |",
        f"| restart speed-up from the cache (cold / warm, within each run) | {med(speedups):.0f}× ({speedups[0]:.0f}–{speedups[-1]:.0f}) |",
        f"| one charge-minutes row, straight to the loaded `Model` | {m['model'] / 1e3:.2f} µs |",
        f"| the same row through `Registry::score` (routes with a time window and a canary hash, ledger) | {m['registry'] / 1e3:.2f} µs |",
        f"| routing + ledger overhead per request | {med(overheads):.0f} ns ({overheads[0]:.0f}–{overheads[-1]:.0f}) |",
        "",
        "The warm open still reads and hashes every artifact, instantiates each version and runs its",
        "carried checks (40 rows each); only compilation is skipped.",
        END,
    ]
    write_section(START, END, section)

if __name__ == "__main__":
    sys.exit(main())
