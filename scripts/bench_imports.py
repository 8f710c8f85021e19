#!/usr/bin/env python3
"""Measures imported models in one run and writes their section of BENCHMARKS.md.

    python3 scripts/bench_imports.py      (needs `cargo xtask build` first: the trees guest)

Trains a 500-tree LightGBM model, a 300-tree XGBoost model, a deep LightGBM
model (255 leaves per tree) and a 1 000-tree LightGBM model on scikit-learn's
Friedman #1 generator (`sklearn.datasets.make_friedman1`, 20 000 rows, 10
features, noise 1, random_state 0), times each toolkit's own single-threaded
predict on the same 1 024 rows (median of 31) and on one row (median of
1 001), then runs
`cargo bench -p paddock-tests --bench imported`, which imports the files,
scores the rows in the sandbox and natively (same params, same bits) and
times import + pack of the 1 000-tree model. The section sits between the
markers below and replaces the previous one.
"""
import json
import os
import sys
import time

import lightgbm
import numpy
import xgboost
from sklearn.datasets import make_friedman1

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_table import ROOT, bench_table, cpu, write_section  # noqa: E402

START = "<!-- imports-bench -->"
END = "<!-- /imports-bench -->"
OUT = os.path.join(ROOT, "target/paddock/bench-imports")
ROWS = 1024
REPS = 31
ROW_REPS = 1001
CONTRIB_REPS = 5


def median_ns(predict, reps=REPS):
    times = []
    for _ in range(reps):
        t = time.perf_counter_ns()
        predict()
        times.append(time.perf_counter_ns() - t)
    return sorted(times)[reps // 2]


def main():
    os.makedirs(OUT, exist_ok=True)
    x, y = make_friedman1(n_samples=20000, noise=1.0, random_state=0)
    batch = x[:ROWS]
    common = dict(random_state=0, n_jobs=1)
    lgb = lightgbm.LGBMRegressor(n_estimators=500, num_leaves=31, learning_rate=0.05, verbose=-1, **common).fit(x, y)
    lgb.booster_.save_model(os.path.join(OUT, "lgb-500.txt"))
    big = lightgbm.LGBMRegressor(n_estimators=1000, num_leaves=31, learning_rate=0.05, verbose=-1, **common).fit(x, y)
    big.booster_.save_model(os.path.join(OUT, "lgb-1000.txt"))
    deep = lightgbm.LGBMRegressor(n_estimators=200, num_leaves=255, learning_rate=0.05, verbose=-1, **common).fit(x, y)
    deep.booster_.save_model(os.path.join(OUT, "lgb-deep.txt"))
    xgb = xgboost.XGBRegressor(n_estimators=300, max_depth=6, learning_rate=0.1, **common).fit(x, y)
    xgb.save_model(os.path.join(OUT, "xgb-300.json"))
    booster = xgb.get_booster()
    booster.set_param({"nthread": 1})
    matrix = xgboost.DMatrix(batch)
    one = batch[:1]
    toolkit = {
        "LightGBM": {
            "version": lightgbm.__version__,
            "batch_ns": median_ns(lambda: lgb.booster_.predict(batch, num_threads=1)),
            "row_ns": median_ns(lambda: lgb.booster_.predict(one, num_threads=1), ROW_REPS),
            "contrib_ns": median_ns(lambda: lgb.booster_.predict(batch, num_threads=1, pred_contrib=True), CONTRIB_REPS),
        },
        # inplace_predict, as XGBRegressor.predict does: a DMatrix would cache its predictions.
        "XGBoost": {
            "version": xgboost.__version__,
            "batch_ns": median_ns(lambda: booster.inplace_predict(batch)),
            "row_ns": median_ns(lambda: booster.inplace_predict(one), ROW_REPS),
            # Contributions take a DMatrix (made once, outside the timing); they are not cached.
            "contrib_ns": median_ns(lambda: booster.predict(matrix, pred_contribs=True), CONTRIB_REPS),
        },
        "LightGBM deep": {
            "version": lightgbm.__version__,
            "batch_ns": median_ns(lambda: deep.booster_.predict(batch, num_threads=1)),
            "row_ns": median_ns(lambda: deep.booster_.predict(one, num_threads=1), ROW_REPS),
        },
    }
    with open(os.path.join(OUT, "toolkit.json"), "w") as f:
        json.dump(toolkit, f)
    with open(os.path.join(OUT, "rows.json"), "w") as f:
        json.dump(batch.tolist(), f)
    table = bench_table("imported")
    section = [
        START,
        "## Imported models: XGBoost and LightGBM",
        "",
        f"`python3 scripts/bench_imports.py`: one run. Machine: {cpu()}, {os.cpu_count()} cores. Models trained on",
        "scikit-learn's Friedman #1 generator (20 000 rows, 10 features): LightGBM 500 trees of 31 leaves, XGBoost",
        "300 trees of depth 6, and a deep LightGBM model, 200 trees of 255 leaves (depths 12 to 42); a",
        "batch of 1 024 of the generator's rows, and single rows (those rows in turn). Batches: sandbox and native",
        "alternate, median of 101; single rows: 2 020 in the sandbox one after another, then as many natively,",
        "medians (as the toolkit's are timed: alternating would leave each a cold cache); native = the same params evaluated by the same",
        "Rust code outside the sandbox (bit for bit the same answers, checked before timing). The toolkit's own",
        "predict, median of 31 batches and 1 001 single rows, runs in this process's Python on one thread",
        "(`num_threads=1`, `nthread=1`): LightGBM's `Booster.predict`, XGBoost's `inplace_predict` (what the",
        "scikit-learn API's `predict` calls; a `DMatrix` would cache the predictions it already made). A single",
        "row through the toolkit includes its Python call, as a service calling it would pay. Targets (issue",
        "32): a batch at ≥ 1.5× the toolkit's speed, a single row at ≥ 2×.",
        "",
        table,
        "",
        "The second table: the same batch explained (per-row contributions, the path-dependent algorithm), in the",
        "sandbox and natively (bit for bit the same numbers, checked before timing), median of 5 each, against the",
        "toolkit's own contribution call on one thread, median of 5 (LightGBM `predict(..., pred_contrib=True)`,",
        "XGBoost `predict(DMatrix, pred_contribs=True)`, the DMatrix made beforehand). \"NaNs not canonicalized\":",
        "the same artifact in a runtime built with `RuntimeConfig { canonical_nans: false, .. }`, median of 5 —",
        "the algorithm is float arithmetic throughout, and by default the engine checks every float result for",
        "NaN to keep the bits the same on every machine (about four instructions per operation on x86-64), which",
        "is most of the sandbox's cost here; scoring, which mostly compares, barely pays it. The last column is",
        "the cost of the covers to a request that does not ask for contributions: the model as imported, with",
        "its covers, against the same trees packed without them, scoring alternately in the same run.",
        "",
        "The aim was explaining in the sandbox at 0.8× native speed or better; it is not met. Natively the",
        "algorithm keeps pace with the toolkits' own (the same steps in the same order, so LightGBM's numbers to",
        "the last bits); in the sandbox, NaN canonicalization alone is the difference between the \"NaNs not",
        "canonicalized\" column and the first. Skipping the products by a 0-or-1 fraction (same bits) and working two path steps",
        "in one loop gained about 12 %. Left for later: two steps per WebAssembly SIMD operation (canonicalized",
        "once for both lanes). A 500-tree model explains about 190 rows a second in the sandbox: a request that",
        "asks for many rows' contributions needs a call deadline to match (`Limits::deadline`, 50 ms by default).",
        "",
        "The third table: what counting drift against a training profile costs a warm call (docs/drift.md): the",
        "profiled 60-tree diabetes model of the fidelity exports loaded twice from one artifact, counting on and",
        "off, the same typed rows scored alternately, median of 2 001 calls each. Targets: at most 5 % more for",
        "one row, 3 % for 64. Since the trees were laid out (issue 32) the call itself is faster (64 rows: 94 →",
        "60 µs) while counting costs what it did (about 0.15 µs for one row, 3 µs for 64): the ratios rose with",
        "it (64 rows 1.03 → about 1.05, over its target; one row at its 5 % edge). Counting a batch off the",
        "scoring thread is left for later.",
        "",
        "How the first table got here (issue 32; same machine, scratch runs, sandbox, 1 024 rows unless said):",
        "imported trees are laid out for scoring (guest-sdk `layout.rs`): trees no deeper than 8 by levels (every",
        "path as long as the deepest, children at 2s+1 and 2s+2, so a step computes the next slot instead of",
        "loading it), deeper ones with siblings side by side; each row is read twice over, once with NaN as −∞ and",
        "once as +∞, so a split reads the copy that sends an absent value its way and a step is one comparison",
        "(XGBoost 7.3 → 5.0 ms); rows regrouped eight at a time value by value, so one address serves every lane",
        "(→ 3.5 ms); single-precision sums kept in `f32` rather than rounded from `f64` at every addition, one",
        "NaN check instead of four (→ 3.0 ms); indices clamped (a conditional move) instead of bounds-checked (a",
        "branch), so each level is one basic block for Cranelift (→ 2.9 ms); a block of 256 rows through all",
        "trees at a time (→ 2.7 ms). LightGBM 500 trees: 11.1 → 7.7 ms. A row left over walks eight trees at",
        "once (LightGBM 500 trees, one row: 30 → 15 µs; the deep model 48 → 12 µs). Tried and dropped: four,",
        "six, ten, twelve or sixteen rows per group (8 best); the level loop unrolled (3.6 ms: more spilled",
        "registers); split records of threshold, feature and child in one 16-byte record (2.9 ms); thresholds",
        "and values in `f32` for XGBoost (2.8 ms); sixteen or four trees per row (slower); grouping trees of",
        "equal depth for single rows (no gain). XGBoost's batch stays under the 1.5× aim: in the sandbox a level",
        "costs about twice its native instructions (Cranelift spills the eight lanes' state around the level",
        "loop); natively the same code runs 2.0× XGBoost's own predict. LightGBM's single row stays under 2×:",
        "LightGBM's own single-row predict is quick (25 µs for 500 trees through Python), while paddock's",
        "row walks 500 trees of depths up to 18, about 12 µs of dependent loads after the call's own 3 µs.",
        END,
    ]
    write_section(START, END, section)

if __name__ == "__main__":
    main()
