"""Runs README.md's walk from a notebook to a served store as written, once
per toolkit (XGBoost, LightGBM, scikit-learn), and checks the answer `curl`
gets against the toolkit's own `predict` on the same row.

    python3 tests/docs/readme_walk.py PADDOCK

The notebook's data is a pandas DataFrame of invented charging sessions
(demo data: columns `arrival_soc` with missing values, `charger_kw` as a
nullable integer, `plugin_hour`, and for LightGBM a categorical `site`),
handed over with its columns in another order than the model was fitted on.

Each walk runs in a folder of its own whose `target` links to the clone's
(`pack` finds the guests where `cargo xtask build` leaves them). What is
not run as written, and why: the `cargo build` line (PADDOCK is the binary
it builds); `paddock serve` gets `--listen 127.0.0.1:0` and `curl` the port
it printed, so a walk never collides with another server on 7340; the model
file's name takes the extension the README's comment gives per toolkit.
Each walk also packs the same file without the overrides (`--name` and
`--version` instead), as docs/models.md says it may.
"""

import json
import os
import re
import shlex
import subprocess
import sys
import tempfile

import numpy
import pandas

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
PADDOCK = os.path.abspath(sys.argv[1])
EXTENSION = {"xgboost": ".json", "lightgbm": ".txt", "sklearn": ".onnx"}


def blocks():
    """The README's python and sh blocks of the walk."""
    text = open(os.path.join(ROOT, "README.md")).read()
    walk = text[text.index("**From a notebook to a served store.**"):]
    python = re.search(r"```python\n(.*?)```", walk, re.S).group(1)
    sh = re.search(r"```sh\n(.*?)```", walk, re.S).group(1)
    return python, sh


def commands(sh):
    """The sh block's commands: continuation lines joined, comments dropped."""
    joined = sh.replace("\\\n", " ")
    for line in joined.splitlines():
        words = shlex.split(line, comments=True)
        if words:
            yield line.split(" #")[0].strip() if "'" not in line.split(" #")[0] else line, words


def sessions(with_site):
    rng = numpy.random.default_rng(11)
    n = 400
    frame = pandas.DataFrame({
        "arrival_soc": rng.uniform(5, 95, n),
        "charger_kw": pandas.array(rng.choice([7, 11, 22, 50, 150], n), dtype="Int64"),
        "plugin_hour": rng.integers(0, 24, n),
    })
    minutes = (100 - frame["arrival_soc"]) * 64 / frame["charger_kw"].astype(float) * 0.9 + rng.normal(0, 4, n)
    frame.loc[frame.index[::11], "arrival_soc"] = numpy.nan
    frame.loc[frame.index[::17], "charger_kw"] = pandas.NA
    if with_site:
        frame["site"] = pandas.Categorical(rng.choice(["Harbour", "Library Green", "Mill Road"], n))
    return frame, minutes.fillna(60).to_numpy()


def fit(toolkit):
    frame, minutes = sessions(toolkit == "lightgbm")
    if toolkit == "xgboost":
        import xgboost
        model = xgboost.XGBRegressor(n_estimators=30, max_depth=4, random_state=0, n_jobs=1)
        model.fit(frame.astype({"charger_kw": "float64"}), minutes)
    elif toolkit == "lightgbm":
        import lightgbm
        model = lightgbm.LGBMRegressor(n_estimators=30, num_leaves=15, random_state=0, n_jobs=1, verbose=-1)
        model.fit(frame, minutes)
    else:
        from sklearn.ensemble import RandomForestRegressor
        model = RandomForestRegressor(n_estimators=10, max_depth=6, random_state=0, n_jobs=1)
        model.fit(frame.astype({"charger_kw": "float64"}), minutes)
    return model, frame


def predicted(toolkit, model, row):
    """The toolkit's own prediction for the README's curl row."""
    frame = pandas.DataFrame([row])
    if toolkit == "lightgbm":
        frame["site"] = pandas.Categorical([None], categories=["Harbour", "Library Green", "Mill Road"])
    return float(model.predict(frame.astype({"charger_kw": "float64"}) if toolkit != "lightgbm" else frame)[0])


def walk(toolkit, python, sh):
    model, frame = fit(toolkit)
    X_sample = frame.sample(25, random_state=1)[list(reversed(frame.columns))]
    with tempfile.TemporaryDirectory() as here:
        os.symlink(os.path.join(ROOT, "target"), os.path.join(here, "target"))
        os.chdir(here)
        exec(python, {"model": model, "X_sample": X_sample})
        env = dict(os.environ, PATH=os.path.dirname(PADDOCK) + os.pathsep + os.environ["PATH"])
        server, base = None, None
        try:
            for line, words in commands(sh):
                if words[0] == "cargo":
                    continue
                line = line.replace("out/session-minutes.json", "out/session-minutes" + EXTENSION[toolkit])
                if words[:2] == ["paddock", "serve"]:
                    server = subprocess.Popen(words + ["--listen", "127.0.0.1:0"], env=env, stdout=subprocess.PIPE,
                                              stderr=subprocess.DEVNULL, text=True)
                    first = server.stdout.readline()
                    assert first.startswith("listening on "), f"{toolkit}: serve said {first!r}"
                    base = first.split()[-1].replace("http://", "")
                    continue
                if words[0] == "curl":
                    line = line.replace("localhost:7340", base)
                out = subprocess.run(line, shell=True, env=env, capture_output=True, text=True)
                assert out.returncode == 0, f"{toolkit}: `{line}` exited {out.returncode}: {out.stderr}"
                if words[0] == "curl":
                    answer = json.loads(out.stdout)
                    row = json.loads(words[-1])["row"]
                    got = answer["estimates"][0]["value"]
                    want = predicted(toolkit, model, row)
                    # XGBoost and LightGBM bit for bit; scikit-learn within its float32 leaves.
                    limit = 0.0 if toolkit != "sklearn" else abs(want) * 2.0 ** -20
                    assert answer["version"] == "1.0.0", f"{toolkit}: {answer}"
                    assert abs(got - want) <= limit, f"{toolkit}: paddock {got!r}, {toolkit} predict {want!r}"
                    print(f"readme_walk: {toolkit}: curl answered {got} from session-minutes 1.0.0 "
                          f"({toolkit} predict: {want})")
            # docs/models.md: the same file packs without the overrides, named on the command line.
            extension = EXTENSION[toolkit]
            plain = subprocess.run(
                [PADDOCK, "pack", f"out/session-minutes{extension}", "--checks", "out/session-minutes.checks.json",
                 "--name", "session-minutes", "--version", "1.0.1", "--out", "session-minutes-1.0.1.wasm"],
                env=env, capture_output=True, text=True)
            assert plain.returncode == 0, f"{toolkit}: pack without the overrides: {plain.stderr}"
        finally:
            if server is not None:
                server.terminate()
                server.wait()
            os.chdir(ROOT)


def main():
    python, sh = blocks()
    for toolkit in ("xgboost", "lightgbm", "sklearn"):
        walk(toolkit, python, sh)
    print("readme_walk: the README's walk ran as written for XGBoost, LightGBM and scikit-learn")


if __name__ == "__main__":
    main()
