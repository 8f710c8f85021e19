#!/usr/bin/env python3
"""Trains scikit-learn models on datasets shipped inside scikit-learn and
exports each as PMML with nyoka (a scikit-learn → PMML exporter from PyPI),
with scikit-learn's own predictions on every row as a paddock checks file,
for the PMML importer's fidelity tests (`tests/pmml.rs`).

    PYTHON OF ITS OWN VENV  tests/pmml/export.py OUT_DIR

nyoka 5.5.0 supports scikit-learn up to 1.3, so `cargo xtask test` runs this
in a virtual environment of its own (target/paddock/pmml-venv) with
scikit-learn 1.3.2 and numpy 1.26.4 pinned; the predictions are that
scikit-learn's.

nyoka writes a multiclass LogisticRegression one-vs-rest (a logistic per
class, normalised), so that model is trained with multi_class="ovr". It
writes each tree threshold as the shortest text of its float32 rounding,
while scikit-learn compares float32(x) with the double threshold: a row
whose value lies between the two goes the other way in the document. Such
rows are found here, from the trees themselves, and left out of the checks
(their count is in the checks' source); every other row must agree.
"""
import json
import os
import platform
import sys
import warnings

import numpy
import sklearn
from nyoka import skl_to_pmml
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris
from sklearn.ensemble import GradientBoostingClassifier, RandomForestClassifier, RandomForestRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import MinMaxScaler, StandardScaler
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

warnings.filterwarnings("ignore")
OUT = sys.argv[1]
os.makedirs(OUT, exist_ok=True)
NYOKA = "5.5.0"


def names_of(d):
    return [n.replace(" (cm)", "").replace(" ", "_") for n in d.feature_names]


def trees_of(model):
    if hasattr(model, "tree_"):
        return [model]
    if hasattr(model, "estimators_"):
        return list(numpy.ravel(model.estimators_))
    return []


def lost_to_rounding(model, x):
    """Rows some tree decides otherwise from nyoka's float32 text of its
    thresholds than scikit-learn does from the doubles."""
    lost = set()
    for tree in trees_of(model):
        t = tree.tree_
        for r, row in enumerate(x):
            node = 0
            while t.children_left[node] != -1:
                value, threshold = row[t.feature[node]], t.threshold[node]
                ours = numpy.float32(value) <= threshold
                if (value <= float(str(numpy.float32(threshold)))) != ours:
                    lost.add(r)
                node = t.children_left[node] if ours else t.children_right[node]
    return lost


def split_otherwise(model, x):
    """Rows that some split of some tree, on the row's path or not, decides
    otherwise from nyoka's float32 text of its threshold than from the
    double: contributions weigh every split, not only the path's."""
    differ = set()
    for tree in trees_of(model):
        t = tree.tree_
        for node in numpy.nonzero(t.children_left != -1)[0]:
            value, threshold = x[:, t.feature[node]], t.threshold[node]
            ours = numpy.float32(value).astype(numpy.float64) <= threshold
            differ.update(numpy.nonzero(ours != (value <= float(str(numpy.float32(threshold)))))[0].tolist())
    return differ


def write_trees(stem, model, names, rows):
    """The fitted trees as the `shap` package's tree dictionaries (children,
    features, thresholds, leaf values — class fractions for a classifier —
    and each node's cover), with the rows kept in the checks, for
    tests/pmml/contributions.py: `shap` needs a newer numpy than this
    environment's. The covers are `n_node_samples`, the counts nyoka writes
    as each Node's recordCount (a bootstrapped forest's
    `weighted_n_node_samples` count repeated rows again)."""
    trees = trees_of(model)
    if not trees:
        return
    differ = split_otherwise(model, rows)
    rows = [r for i, r in enumerate(rows) if i not in differ]
    scaling = 1.0 / len(trees)
    dicts = []
    for tree in trees:
        t = tree.tree_
        values = t.value.reshape(t.node_count, -1)
        if values.shape[1] > 1:  # class counts → fractions, as predict_proba takes them
            values = values / values.sum(axis=1, keepdims=True)
        dicts.append({
            "children_left": t.children_left.tolist(),
            "children_right": t.children_right.tolist(),
            "children_default": t.children_left.tolist(),
            "features": t.feature.tolist(),
            "thresholds": t.threshold.tolist(),
            "values": (values * scaling).tolist(),
            "node_sample_weight": t.n_node_samples.astype(float).tolist(),
        })
    with open(os.path.join(OUT, f"{stem}.trees.json"), "w") as f:
        json.dump({"source": f"scikit-learn {sklearn.__version__} {type(model).__name__} ({len(differ)} more rows left "
                             "out: a value between some threshold and nyoka's text of it)", "names": names,
                   "classes": [str(c) for c in getattr(model, "classes_", [])], "trees": dicts,
                   "rows": [list(map(float, r)) for r in rows]}, f)


def write_terms(stem, pipeline, names, rows):
    """A linear model's terms as NumPy computes them from scikit-learn's own
    scaler and coefficients: weight × scaled value per feature, the
    intercept as the baseline (tests/pmml.rs compares)."""
    scaled = pipeline[:-1].transform(rows) if len(pipeline) > 1 else rows
    model = pipeline.steps[-1][1]
    terms = numpy.column_stack([scaled * model.coef_, numpy.full(len(rows), model.intercept_)])
    with open(os.path.join(OUT, f"{stem}.contrib.json"), "w") as f:
        json.dump({"source": f"NumPy {numpy.__version__} from scikit-learn {sklearn.__version__}'s "
                             f"{type(pipeline[0]).__name__}.transform and {type(model).__name__}.coef_, intercept_",
                   "names": names, "x": [list(map(float, r)) for r in rows], "contrib": terms.tolist()}, f)


def export(stem, steps, data, target):
    x, y = data.data, data.target
    names = names_of(data)
    pipeline = Pipeline(steps).fit(x, y)
    lost = lost_to_rounding(pipeline.steps[-1][1], x)
    skl_to_pmml(pipeline, names, target, os.path.join(OUT, f"{stem}.pmml"))
    model = pipeline.steps[-1][1]
    if hasattr(model, "predict_proba"):
        predicted = pipeline.predict_proba(x)
        outputs = [f"probability_{c}" for c in model.classes_]
        method = "predict_proba"
    else:
        predicted = pipeline.predict(x).reshape(-1, 1)
        outputs = [target]
        method = "predict"
    cases = [{"row": dict(zip(names, map(float, row))), "expect": dict(zip(outputs, map(float, p)))}
             for r, (row, p) in enumerate(zip(x, predicted)) if r not in lost]
    checks = {
        "source": f"scikit-learn {sklearn.__version__} {type(model).__name__}.{method} on {len(cases)} rows "
                  f"({len(lost)} left out: a value between a threshold and nyoka's float32 text of it), exported by nyoka {NYOKA} "
                  f"(numpy {numpy.__version__}, Python {platform.python_version()})",
        # The document's arithmetic orders some sums and products otherwise
        # than scikit-learn does; a wrong split or link moves far more.
        "tolerance": {"abs": 1e-12, "rel": 1e-9},
        "cases": cases,
    }
    with open(os.path.join(OUT, f"{stem}.checks.json"), "w") as f:
        json.dump(checks, f)
    kept = numpy.array([row for r, row in enumerate(x) if r not in lost])
    if "Boosting" not in type(model).__name__:  # a boosted model is a model chain, declined
        write_trees(stem, model, names, kept)
    if hasattr(model, "coef_") and not hasattr(model, "predict_proba"):
        write_terms(stem, pipeline, names, kept)
    # The rows left out, with scikit-learn's answer: the document must answer otherwise.
    lost_cases = [{"row": dict(zip(names, map(float, x[r]))), "expect": dict(zip(outputs, map(float, predicted[r])))} for r in sorted(lost)]
    with open(os.path.join(OUT, f"{stem}.lost.json"), "w") as f:
        json.dump({"source": checks["source"], "tolerance": checks["tolerance"], "cases": lost_cases}, f)


iris, cancer, diabetes = load_iris(), load_breast_cancer(), load_diabetes()
export("iris-tree", [("model", DecisionTreeClassifier(max_depth=4, random_state=0))], iris, "species")
export("iris-forest", [("model", RandomForestClassifier(n_estimators=20, max_depth=4, random_state=0))], iris, "species")
export("cancer-forest", [("model", RandomForestClassifier(n_estimators=20, max_depth=4, random_state=0))], cancer, "diagnosis")
export("iris-logistic", [("scale", StandardScaler()), ("model", LogisticRegression(multi_class="ovr", max_iter=1000))], iris, "species")
export("cancer-boosted", [("model", GradientBoostingClassifier(n_estimators=30, max_depth=3, random_state=0))], cancer, "diagnosis")
export("diabetes-tree", [("model", DecisionTreeRegressor(max_depth=5, random_state=0))], diabetes, "progression")
export("diabetes-forest", [("model", RandomForestRegressor(n_estimators=20, max_depth=5, random_state=0))], diabetes, "progression")
export("diabetes-linear", [("scale", MinMaxScaler()), ("model", LinearRegression())], diabetes, "progression")
print(f"exported to {OUT}: scikit-learn {sklearn.__version__} via nyoka {NYOKA}, numpy {numpy.__version__}")
