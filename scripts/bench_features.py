#!/usr/bin/env python3
"""Runs the `features` bench and writes its section of BENCHMARKS.md.

    python3 scripts/bench_features.py      (needs `cargo xtask build` first, redis-server and PostgreSQL)

One run of `cargo bench -p paddock-tests --bench features`: the same linear
model over 8 features served four ways in one process — every feature in
the request (the baseline), 6 looked up in an embedded table, in Redis on
loopback, or in PostgreSQL on loopback — at 1 and 64 rows per request,
each request timed.
The section sits between the markers below and replaces the previous one.
`python3 scripts/http_load.py lookups` measures the same through `serve`.
"""
import os
import platform
import sys
from datetime import date

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_table import bench_table, cpu, write_section  # noqa: E402

START = "<!-- features-bench -->"
END = "<!-- /features-bench -->"


def to_ns(text):
    value, unit = text.split()
    return float(value) * {"ns": 1.0, "µs": 1e3, "ms": 1e6}[unit]


def main():
    table = bench_table("features")
    row = next(line for line in table.splitlines() if line.startswith("| table | 1 |"))
    added = to_ns(row.split("|")[5].strip())
    verdict = "met" if added <= 1000 else "not met"
    write_section(START, END, [
        START,
        "## Features looked up: what a request pays",
        "",
        "`python3 scripts/bench_features.py`: one run of `cargo bench -p paddock-tests --bench features`.",
        "A linear model over 8 features through `Registry::score`; the request carries 2 and the features",
        "plan looks up 6 by the `site` key (10 000 sites, each feature with a freshness limit), from an",
        "embedded CSV table, from Redis hashes (Debian's `redis-server` on loopback, one `HMGET` pipeline",
        "per request) or from a PostgreSQL 15 table (Debian's server on loopback, fsync off, one prepared",
        "`SELECT ... WHERE site = ANY($1)` per request, a pool of 4). The baseline is the same model with every feature in the request, in the same run;",
        "cases interleave in 20 rounds, and each request is timed alone. At 64 rows each row names its own",
        "site. \"Added\" is the case's percentile minus the baseline's.",
        f"Machine: {cpu()}, {os.cpu_count()} cores, {platform.system()} {platform.release()}; measured",
        f"{date.today().isoformat()} on a shared virtual machine, the servers and the bench sharing its cores.",
        "",
        table,
        "",
        "Target from issue 14: a single-row request with 6 looked-up features adds at most 1 µs over scoring",
        f"the assembled row with an embedded table — {added:.0f} ns at the median, {verdict}.",
        END,
    ])


if __name__ == "__main__":
    main()
