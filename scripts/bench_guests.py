#!/usr/bin/env python3
"""Measures every kind of guest in one run and writes its section of BENCHMARKS.md.

    python3 scripts/bench_guests.py      (needs `cargo xtask test` first: the artifacts and exports)

Runs `cargo bench -p paddock-tests --bench guests` once: the same model in
Rust, Python and JavaScript, and scikit-learn models in the Rust generic
guest and the ONNX evaluator, all measured in that one run; ratios are
against the Rust guest of the same model. The section sits between the
markers below and replaces the previous one.
"""
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_table import bench_table, cpu, write_section  # noqa: E402

START = "<!-- guests-bench -->"
END = "<!-- /guests-bench -->"


def main():
    table = bench_table("guests")
    section = [
        START,
        "## Guest kinds: Rust, Python, JavaScript, ONNX",
        "",
        f"`python3 scripts/bench_guests.py`: one run of `cargo bench -p paddock-tests --bench guests`. "
        f"Machine: {cpu()}, {os.cpu_count()} cores.",
        "Cold load = compile + first instance + `init` + contract (median of 3); warm load = the same with",
        "compiled code from the cache (median of 5); primed load = a fresh-per-call load with the primed",
        "component in the cache (median of 5); fresh instance = a one-row call on a new instance",
        "(`Isolation::FreshPerCall`: primed where the model is, so without `init`); peak memory = the instance's linear memory after a 256-row call;",
        "1 row and per row are medians over warm instances. Python and JavaScript run under the default",
        "WASI policy. The ratio compares per-row cost with the Rust guest of the same model.",
        "",
        table,
        "",
        "Python and JavaScript carry their whole language runtime (CPython, SpiderMonkey) in the artifact,",
        "so they are large, compile for seconds once (then load from the code cache),",
        "and their calls cost more than a Rust guest's. Their runtimes draw randomness and read the clock in",
        "`init`; under the fixed WASI policy they are primed all the same (each new instance's world starts",
        "where `init` left the priming one), so a fresh instance per call starts from the snapshot.",
        "The ONNX evaluator carries tract (every operator it implements) whatever the graph's size.",
        END,
    ]
    write_section(START, END, section)

if __name__ == "__main__":
    main()
