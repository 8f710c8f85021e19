#!/usr/bin/env python3
"""Ten million rows through an imported model, against the toolkit on the same file; writes
its section of BENCHMARKS.md.

    python3 scripts/bench_batch.py [ROWS]      (default 10 000 000; needs `cargo xtask build`)

Trains the imports benchmark's 500-tree LightGBM model on scikit-learn's Friedman #1 generator
(`sklearn.datasets.make_friedman1`, 20 000 rows, 10 features, noise 1, random_state 0; the same
model `scripts/bench_imports.py` trains), packs it with the release `paddock`, and writes ROWS
rows of the same generator (random_state 1) as one Parquet file (pyarrow, 1 Mi-row groups).
Then, in turn, each end to end from the file to a Parquet file of results:

- `paddock score MODEL rows.parquet --out scored.parquet` (every core, the default);
- LightGBM: the file read with pyarrow into one float64 matrix, `Booster.predict(X,
  num_threads=<cores>)`, the predictions written with pyarrow.

Each runs under `/usr/bin/time -v` for its wall time and peak resident memory. The first
thousand answers of both are compared (paddock's own tests hold them equal bit for bit).
"""
import os
import subprocess
import sys
import time

import lightgbm
import numpy
import pyarrow
import pyarrow.parquet
from sklearn.datasets import make_friedman1

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_table import ROOT, cpu, write_section  # noqa: E402

START = "<!-- batch-bench -->"
END = "<!-- /batch-bench -->"
OUT = os.path.join(ROOT, "target/paddock/bench-batch")
PADDOCK = os.path.join(ROOT, "target/release/paddock")

TOOLKIT = """
import sys, numpy, pyarrow, pyarrow.parquet, lightgbm
model, rows, out, threads = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4])
table = pyarrow.parquet.read_table(rows)
x = numpy.column_stack([table.column(i).to_numpy() for i in range(table.num_columns)])
del table
y = lightgbm.Booster(model_file=model).predict(x, num_threads=threads)
pyarrow.parquet.write_table(pyarrow.table({"value": y}), out)
"""


def timed(args):
    """Runs `args` under /usr/bin/time -v: (wall seconds, peak resident MiB)."""
    start = time.perf_counter()
    run = subprocess.run(["/usr/bin/time", "-v", *args], cwd=ROOT, capture_output=True, text=True)
    wall = time.perf_counter() - start
    if run.returncode != 0:
        sys.exit(f"{args[0]} failed:\n{run.stderr}")
    peak_kib = next(int(l.split(":")[1]) for l in run.stderr.splitlines() if "Maximum resident set size" in l)
    return wall, peak_kib / 1024


def main():
    rows = int(sys.argv[1]) if len(sys.argv) > 1 else 10_000_000
    os.makedirs(OUT, exist_ok=True)
    subprocess.run(["cargo", "build", "--release", "-q", "-p", "paddock-cli", "--bin", "paddock"], cwd=ROOT, check=True)
    x, y = make_friedman1(n_samples=20000, noise=1.0, random_state=0)
    model = os.path.join(OUT, "lgb-500.txt")
    lightgbm.LGBMRegressor(n_estimators=500, num_leaves=31, learning_rate=0.05, verbose=-1, random_state=0,
                           n_jobs=1).fit(x, y).booster_.save_model(model)
    artifact = os.path.join(OUT, "lgb-500.paddock")
    subprocess.run([PADDOCK, "pack", model, "--out", artifact], cwd=ROOT, check=True, capture_output=True)
    path = os.path.join(OUT, f"rows-{rows}.parquet")
    if not os.path.exists(path):
        generated, _ = make_friedman1(n_samples=rows, noise=1.0, random_state=1)
        table = pyarrow.table({f"Column_{i}": generated[:, i] for i in range(generated.shape[1])})
        pyarrow.parquet.write_table(table, path, row_group_size=1 << 20)
        del generated, table
    cores = os.cpu_count()
    ours_out, theirs_out = os.path.join(OUT, "scored-paddock.parquet"), os.path.join(OUT, "scored-lightgbm.parquet")
    ours = timed([PADDOCK, "score", artifact, path, "--out", ours_out])
    theirs = timed([sys.executable, "-c", TOOLKIT, model, path, theirs_out, str(cores)])
    a = pyarrow.parquet.read_table(ours_out).column("value").to_numpy()[:1000]
    b = pyarrow.parquet.read_table(theirs_out).column("value").to_numpy()[:1000]
    if not numpy.array_equal(a, b):
        sys.exit("paddock's and LightGBM's answers differ")
    size = os.path.getsize(path) / (1 << 20)
    ratio = theirs[0] / ours[0]
    section = [
        START,
        "## Batch scoring: ten million rows from a Parquet file",
        "",
        f"`python3 scripts/bench_batch.py`: one run. Machine: {cpu()}, {cores} cores. The imports benchmark's",
        "500-tree LightGBM model (Friedman #1, 10 features), and "
        f"{rows:,} rows of the same generator in one Parquet file ({size:.0f} MiB, 1 Mi-row groups). End to",
        "end from that file to a Parquet file of results, each under `/usr/bin/time -v`: `paddock score` with",
        "its defaults (every core; batches of 512 rows), against LightGBM reading the file with pyarrow into one",
        f"matrix and calling `Booster.predict(X, num_threads={cores})`, its answers written with pyarrow. The",
        "first thousand answers of both are the same numbers.",
        "",
        "| | wall time | rows/s | peak memory |",
        "|---|---|---|---|",
        f"| `paddock score` (sandbox, {cores} threads) | {ours[0]:.1f} s | {rows / ours[0]:,.0f} | {ours[1]:,.0f} MiB |",
        f"| LightGBM {lightgbm.__version__} `predict`, {cores} threads | {theirs[0]:.1f} s | {rows / theirs[0]:,.0f} "
        f"| {theirs[1]:,.0f} MiB |",
        "",
        f"paddock's speed against LightGBM's: **{ratio:.2f}×** (aim: beat it — "
        f"{'met' if ratio > 1 else 'not met'}). paddock's memory stays at a batch per thread and a row group",
        "being written, whatever the file's size; LightGBM's holds the whole matrix and its answers.",
        END,
    ]
    write_section(START, END, section)


if __name__ == "__main__":
    main()
