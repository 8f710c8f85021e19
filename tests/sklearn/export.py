#!/usr/bin/env python3
"""Trains scikit-learn reference models on an open dataset and exports them
for the fidelity tests (`tests/sklearn.rs`).

    python3 tests/sklearn/export.py OUT_DIR

Dataset: the diabetes data shipped inside scikit-learn
(`sklearn.datasets.load_diabetes`, Efron, Hastie, Johnstone & Tibshirani,
"Least Angle Regression", Annals of Statistics 2004): 442 patients, 10
features (age, sex, bmi, bp, s1–s6, mean-centred and scaled), target a
measure of disease progression one year later.

Writes, with the library versions that produced them:
- `linear.json`: `LinearRegression` — intercept and coefficients;
- `boosted.json`: `GradientBoostingRegressor` (squared error, 120 trees of
  depth 3, learning rate 0.1, random_state 0) — the initial prediction, the
  learning rate and every tree's nodes (feature, threshold, children, value);
each with the feature names, all 442 rows, and scikit-learn's own
`predict()` on them — the values the sandbox must reproduce.

Through skl2onnx (ONNX, float32), for the ONNX evaluator guest:
- `onnx-linear.onnx`: `LinearRegression` (ONNX-ML `LinearRegressor`);
- `onnx-mlp.onnx`: `MLPRegressor` (16 ReLU units, lbfgs, random_state 0;
  standard ONNX MatMul/Add/Relu);
each with a paddock manifest (`.toml`) and a `.json` of the rows and
scikit-learn's float64 predictions.
"""
import json
import os
import platform
import sys

import numpy
import onnx
import skl2onnx
import sklearn
from sklearn.datasets import load_diabetes
from sklearn.ensemble import GradientBoostingRegressor
from sklearn.linear_model import LinearRegression
from sklearn.neural_network import MLPRegressor


def versions():
    return {"python": platform.python_version(), "scikit-learn": sklearn.__version__, "numpy": numpy.__version__,
            "skl2onnx": skl2onnx.__version__, "onnx": onnx.__version__}


def main():
    out = sys.argv[1]
    os.makedirs(out, exist_ok=True)
    data = load_diabetes()
    X, y = data.data, data.target
    names = list(data.feature_names)
    common = {"dataset": "sklearn.datasets.load_diabetes (442 rows, 10 features)", "versions": versions(),
              "features": names, "rows": X.tolist()}

    linear = LinearRegression().fit(X, y)
    with open(os.path.join(out, "linear.json"), "w") as f:
        json.dump({**common, "model": "LinearRegression()", "intercept": float(linear.intercept_),
                   "coef": linear.coef_.tolist(), "predictions": linear.predict(X).tolist()}, f)

    boosted = GradientBoostingRegressor(n_estimators=120, max_depth=3, learning_rate=0.1, random_state=0).fit(X, y)
    trees = []
    for stage in boosted.estimators_[:, 0]:
        t = stage.tree_
        trees.append({
            "children_left": t.children_left.tolist(),
            "children_right": t.children_right.tolist(),
            "feature": t.feature.tolist(),
            "threshold": t.threshold.tolist(),
            "value": t.value[:, 0, 0].tolist(),
        })
    # With the default init ("mean" for squared error) the starting raw
    # prediction is a constant: read it off the fitted model.
    init = float(boosted.init_.predict(X[:1])[0])
    with open(os.path.join(out, "boosted.json"), "w") as f:
        json.dump({**common, "model": "GradientBoostingRegressor(n_estimators=120, max_depth=3, learning_rate=0.1, random_state=0)",
                   "init": init, "learning_rate": boosted.learning_rate, "trees": trees,
                   "predictions": boosted.predict(X).tolist()}, f)
    mlp = MLPRegressor(hidden_layer_sizes=(16,), solver="lbfgs", max_iter=5000, random_state=0).fit(X, y)
    for name, model, about in [("onnx-linear", linear, "LinearRegression()"),
                               ("onnx-mlp", mlp, "MLPRegressor(hidden_layer_sizes=(16,), solver='lbfgs', random_state=0)")]:
        graph = skl2onnx.to_onnx(model, X[:1].astype(numpy.float32), target_opset={"": 17, "ai.onnx.ml": 3})
        with open(os.path.join(out, f"{name}.onnx"), "wb") as f:
            f.write(graph.SerializeToString())
        with open(os.path.join(out, f"{name}.toml"), "w") as f:
            f.write(manifest(name, names, about))
        with open(os.path.join(out, f"{name}.json"), "w") as f:
            json.dump({**common, "model": about, "predictions": model.predict(X).tolist()}, f)
    print(f"exported LinearRegression, GradientBoostingRegressor and (ONNX) MLPRegressor on diabetes to {out} ({versions()})")


def manifest(name, features, about):
    """A paddock ONNX manifest: every feature a real number, one output."""
    lines = [f'name = "{name}"', 'version = "1.0.0"',
             f'about = "{about} on the diabetes data, exported by skl2onnx"', 'input = "X"', ""]
    for feature in features:
        lines += ["[[features]]", f'name = "{feature}"', 'domain = { real = {} }', ""]
    lines += ["[[outputs]]", 'name = "progression"', 'tensor = "variable"', "column = 0",
              'about = "disease progression one year later"', ""]
    return "\n".join(lines)


if __name__ == "__main__":
    main()
