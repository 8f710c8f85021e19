#!/usr/bin/env python3
"""Trains XGBoost and LightGBM models on datasets shipped inside
scikit-learn and hands each off with paddock_handoff (the model file its
toolkit saves, and every row with the toolkit's own predictions as a
checks file), for the importers' fidelity tests (`tests/imports.rs`).

    python3 tests/imports/export.py OUT_DIR

Datasets (scikit-learn's `sklearn.datasets`): diabetes (Efron et al.,
Annals of Statistics 2004; 442 rows, regression), breast cancer (Wisconsin
diagnostic, 569 rows, binary), wine (178 rows, 3 classes), iris (Fisher
1936, 150 rows, 3 classes). Missing values are injected into some columns
(a fixed 10 % of their cells) where the toolkit handles them.
"""
import json
import os
import sys

import lightgbm
import numpy
import xgboost
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris, load_wine

from paddock_handoff import hand_off

OUT = sys.argv[1]
os.makedirs(OUT, exist_ok=True)
rng = numpy.random.default_rng(7)


def data(loader, holes=()):
    d = loader()
    x = numpy.array(d.data, dtype=numpy.float64)
    for col in holes:
        x[rng.random(len(x)) < 0.1, col] = numpy.nan
    names = [n.replace(" ", "_").replace("(", "").replace(")", "") for n in d.feature_names]
    return x, d.target, names


def contributions(name, x, contrib, source):
    """The toolkit's own per-row contributions for every row of `x`, one
    list per row (class after class, each features then the baseline),
    beside the model file: `NAME.contrib.json` (absent cells as null)."""
    rows = [[None if numpy.isnan(v) else float(v) for v in row] for row in x]
    flat = numpy.asarray(contrib, dtype=numpy.float64).reshape(len(x), -1)
    with open(os.path.join(OUT, name + ".contrib.json"), "w") as f:
        json.dump({"source": source, "x": rows, "contrib": flat.tolist()}, f)


def xgb(name, model, x, y, names):
    model.fit(x, y)
    model.get_booster().feature_names = names
    hand_off(model, x, os.path.join(OUT, name))
    contrib = model.get_booster().predict(xgboost.DMatrix(x, feature_names=names), pred_contribs=True)
    contributions(name, x, contrib, f"XGBoost {xgboost.__version__} Booster.predict(pred_contribs=True)")


def lgb(name, model, x, y, names, **fit):
    model.fit(x, y, feature_name=names, **fit)
    hand_off(model, x, os.path.join(OUT, name))
    contrib = model.booster_.predict(x, pred_contrib=True)
    contributions(name, x, contrib, f"LightGBM {lightgbm.__version__} Booster.predict(pred_contrib=True)")


XGB = dict(n_estimators=60, max_depth=4, learning_rate=0.2, random_state=0, n_jobs=1)
LGB = dict(n_estimators=60, num_leaves=15, min_child_samples=5, learning_rate=0.1, random_state=0, n_jobs=1, verbose=-1)

x, y, names = data(load_diabetes, holes=(2, 5))
for objective in ["reg:squarederror", "count:poisson", "reg:gamma", "reg:tweedie", "reg:absoluteerror"]:
    xgb("xgb-diabetes-" + objective.split(":")[1], xgboost.XGBRegressor(objective=objective, **XGB), x, y, names)
for objective in ["regression", "poisson", "gamma", "tweedie"]:
    lgb("lgb-diabetes-" + objective, lightgbm.LGBMRegressor(objective=objective, **LGB), x, y, names)
lgb("lgb-diabetes-forest", lightgbm.LGBMRegressor(boosting_type="rf", bagging_fraction=0.7, bagging_freq=1, **LGB), x, y, names)
# Missing type None: trained without missing values, scored with them.
x_full, _, _ = data(load_diabetes)
model = lightgbm.LGBMRegressor(use_missing=False, **LGB).fit(x_full, y, feature_name=names)
hand_off(model, x, os.path.join(OUT, "lgb-diabetes-missing-none"))
# Missing type Zero: zeros (and NaN) count as missing.
x_zero = x.copy()
x_zero[rng.random(len(x)) < 0.15, 3] = 0.0
lgb("lgb-diabetes-zero-missing", lightgbm.LGBMRegressor(zero_as_missing=True, **LGB), x_zero, y, names)

x, y, names = data(load_breast_cancer, holes=(0, 7, 20))
xgb("xgb-cancer-logistic", xgboost.XGBClassifier(**XGB), x, y, names)
xgb("xgb-cancer-reglogistic", xgboost.XGBRegressor(objective="reg:logistic", **XGB), x, y, names)
xgb("xgb-cancer-logitraw", xgboost.XGBRegressor(objective="binary:logitraw", **XGB), x, y, names)
lgb("lgb-cancer-binary", lightgbm.LGBMClassifier(**LGB), x, y, names)
lgb("lgb-cancer-binary-sigmoid", lightgbm.LGBMClassifier(sigmoid=0.7, **LGB), x, y, names)

x, y, names = data(load_wine, holes=(1, 9))
xgb("xgb-wine-softprob", xgboost.XGBClassifier(**XGB), x, y, names)
# A categorical feature: the alcohol content in 9 bins, codes 0–8, some absent.
codes = numpy.floor((x[:, 0] - 11.0) * 2.4).clip(0, 8)
codes[rng.random(len(x)) < 0.1] = numpy.nan
xc = numpy.column_stack([x, codes])
lgb("lgb-wine-categorical", lightgbm.LGBMClassifier(min_data_per_group=5, cat_smooth=1.0, **LGB), xc, y, names + ["alcohol_band"],
    categorical_feature=[len(names)])

x, y, names = data(load_iris, holes=(2,))
xgb("xgb-iris-softmax", xgboost.XGBClassifier(objective="multi:softmax", **XGB), x, y, names)
lgb("lgb-iris-one-vs-rest", lightgbm.LGBMClassifier(objective="multiclassova", **LGB), x, y, names)
print(f"exported to {OUT}: XGBoost {xgboost.__version__}, LightGBM {lightgbm.__version__}, numpy {numpy.__version__}")

# Files the importers must refuse, naming the place.
x, y, names = data(load_wine)
codes = numpy.floor((x[:, 0] - 11.0) * 2.4).clip(0, 8)
dm = xgboost.DMatrix(numpy.column_stack([codes, x[:, 1:]]), label=y, enable_categorical=True,
                     feature_types=["c"] + ["q"] * (x.shape[1] - 1))
booster = xgboost.train({"objective": "multi:softprob", "num_class": 3, "max_depth": 3, "max_cat_to_onehot": 1, "nthread": 1}, dm, 5)
booster.save_model(os.path.join(OUT, "refused-xgb-categorical.json"))
x, y, names = data(load_diabetes)
model = lightgbm.LGBMRegressor(linear_tree=True, **LGB).fit(x, y, feature_name=names)
model.booster_.save_model(os.path.join(OUT, "refused-lgb-linear.txt"))

# scikit-learn tree ensembles through skl2onnx (float32 input, as skl2onnx's
# FloatTensorType): the ONNX file, and scikit-learn's own predict() on every row.
import skl2onnx  # noqa: E402
import sklearn  # noqa: E402
from skl2onnx import to_onnx  # noqa: E402
from skl2onnx.common.data_types import FloatTensorType  # noqa: E402
from sklearn.ensemble import ExtraTreesRegressor, GradientBoostingRegressor, RandomForestRegressor  # noqa: E402
from sklearn.tree import DecisionTreeRegressor  # noqa: E402



def skl_trees(name, model, x):
    """Hands off a fitted scikit-learn tree model and writes the `shap`
    package's path-dependent tree contributions on every row (PyPI `shap`,
    TreeExplainer(feature_perturbation="tree_path_dependent"), which reads
    the covers from the fitted trees themselves). A binary classifier's
    probability output is class 1's."""
    import shap

    hand_off(model, x, os.path.join(OUT, name))
    explainer = shap.TreeExplainer(model, feature_perturbation="tree_path_dependent")
    values = numpy.asarray(explainer.shap_values(x), dtype=numpy.float64)
    expected = numpy.atleast_1d(numpy.asarray(explainer.expected_value, dtype=numpy.float64))
    if values.ndim == 2:
        values = values[:, :, None]
    if values.shape[2] == 2 and len(expected) == 2:  # two probability columns: paddock gives class 1's
        values, expected = values[:, :, 1:], expected[1:]
    blocks = [numpy.column_stack([values[:, :, k], numpy.full(len(x), expected[k])]) for k in range(values.shape[2])]
    contributions(name, x, numpy.hstack(blocks), f"shap {shap.__version__} TreeExplainer (tree_path_dependent) "
                  f"of scikit-learn {sklearn.__version__} {type(model).__name__}")


x, y, names = data(load_diabetes)
for name, model in [
    ("skl-diabetes-tree", DecisionTreeRegressor(max_depth=6, random_state=0)),
    ("skl-diabetes-forest", RandomForestRegressor(n_estimators=40, max_depth=8, random_state=0, n_jobs=1)),
    ("skl-diabetes-extra", ExtraTreesRegressor(n_estimators=40, max_depth=8, random_state=0, n_jobs=1)),
    ("skl-diabetes-boosted", GradientBoostingRegressor(n_estimators=80, max_depth=3, random_state=0)),
]:
    skl_trees(name, model.fit(x, y), x)
# HistGradientBoosting learns where absent values go: holes in the data.
from sklearn.ensemble import (ExtraTreesClassifier, GradientBoostingClassifier, HistGradientBoostingClassifier,  # noqa: E402
                              HistGradientBoostingRegressor, RandomForestClassifier)
from sklearn.linear_model import LinearRegression, LogisticRegression, Ridge  # noqa: E402
from sklearn.tree import DecisionTreeClassifier  # noqa: E402

HIST = dict(max_iter=60, max_leaf_nodes=15, learning_rate=0.1, random_state=0)
x, y, names = data(load_diabetes, holes=(2, 5))
skl_trees("skl-diabetes-hist", HistGradientBoostingRegressor(**HIST).fit(x, y), x)
x, y, names = data(load_diabetes)
# Named columns: the helper writes overrides naming the ONNX file's x0, x1…


def linear_contributions(name, model, x):
    """A linear model's contributions as NumPy computes them from the
    toolkit's own coefficients: weight × value per feature, the intercept
    as the baseline (for a binary classifier, class 1's score)."""
    coef = numpy.atleast_2d(model.coef_)[-1]
    intercept = numpy.atleast_1d(model.intercept_)[-1]
    contrib = numpy.column_stack([x * coef, numpy.full(len(x), intercept)])
    contributions(name, x, contrib, f"NumPy {numpy.__version__} from scikit-learn {sklearn.__version__}'s coef_ and intercept_")


model = LinearRegression().fit(x, y)
hand_off(model, x, os.path.join(OUT, "skl-diabetes-linear"), names=names)
linear_contributions("skl-diabetes-linear", model, x)
model = Ridge(alpha=0.5).fit(x, y)
hand_off(model, x, os.path.join(OUT, "skl-diabetes-ridge"))
linear_contributions("skl-diabetes-ridge", model, x)

x, y, names = data(load_breast_cancer)
skl_trees("skl-cancer-tree", DecisionTreeClassifier(max_depth=5, random_state=0).fit(x, y), x)
skl_trees("skl-cancer-boosted", GradientBoostingClassifier(n_estimators=60, max_depth=3, random_state=0).fit(x, y), x)
model = LogisticRegression(max_iter=10000).fit(x, y)
hand_off(model, x, os.path.join(OUT, "skl-cancer-logistic"))
linear_contributions("skl-cancer-logistic", model, x)
x, y, names = data(load_breast_cancer, holes=(0, 7, 20))
skl_trees("skl-cancer-hist", HistGradientBoostingClassifier(**HIST).fit(x, y), x)

x, y, names = data(load_iris)
skl_trees("skl-iris-forest", RandomForestClassifier(n_estimators=30, max_depth=5, random_state=0, n_jobs=1).fit(x, y), x)
# shap 0.51 explains a binary GradientBoostingClassifier only: no reference for this one's contributions.
hand_off(GradientBoostingClassifier(n_estimators=40, max_depth=2, random_state=0).fit(x, y), x, os.path.join(OUT, "skl-iris-boosted"))
hand_off(LogisticRegression(max_iter=10000).fit(x, y), x, os.path.join(OUT, "skl-iris-logistic"))
x, y, names = data(load_wine)
skl_trees("skl-wine-extra", ExtraTreesClassifier(n_estimators=30, max_depth=6, random_state=0, n_jobs=1).fit(x, y), x)
x, y, names = data(load_wine, holes=(1, 9))
skl_trees("skl-wine-hist", HistGradientBoostingClassifier(**HIST).fit(x, y), x)

# One-vs-rest probabilities, which the importer refuses naming the node.
from sklearn.multiclass import OneVsRestClassifier  # noqa: E402
xc, yc, _ = data(load_iris)
onx = to_onnx(OneVsRestClassifier(LogisticRegression(max_iter=1000)).fit(xc, yc), initial_types=[("X", FloatTensorType([None, 4]))],
              options={"zipmap": False})
with open(os.path.join(OUT, "refused-skl-one-vs-rest.onnx"), "wb") as f:
    f.write(onx.SerializeToString())
print(f"scikit-learn {sklearn.__version__} via skl2onnx {skl2onnx.__version__}")

# A DataFrame as people have them (scikit-learn's diabetes data, as a pandas
# frame): a categorical column of text labels, a string column, a nullable
# integer column with missing values, NaN holes; handed over with its columns
# in another order than the model was fitted on, and the model's name and
# version for the store.
import pandas

frame = load_diabetes(as_frame=True).data
frame["age_band"] = pandas.cut(frame.pop("age"), 4, labels=["band_a", "band_b", "band_c", "band_d"])
frame["sex"] = frame["sex"].map(lambda v: "sex_hi" if v > 0 else "sex_lo").astype("string")
frame["s4"] = (frame["s4"] * 100).round().astype("Int64")
frame.loc[frame.index[::9], "s4"] = pandas.NA
frame.loc[frame.index[::13], "bmi"] = float("nan")
frame["sex"] = frame["sex"].astype("category")
target = load_diabetes().target
model = lightgbm.LGBMRegressor(**LGB).fit(frame, target)
shuffled = frame[list(reversed(frame.columns))]
hand_off(model, shuffled, os.path.join(OUT, "lgb-diabetes-pandas"), name="progression", version="1.2.0")

# A random forest fitted on data with missing values (scikit-learn ≥ 1.4
# trees route NaN by each split's missing_go_to_left), scored on rows with
# missing values: the helper writes those routes into the ONNX file.
from sklearn.ensemble import RandomForestClassifier  # noqa: E402

x, y, names = data(load_breast_cancer, holes=(0, 3))
forest = RandomForestClassifier(n_estimators=20, max_depth=5, random_state=0, n_jobs=1).fit(x, y)
skl_trees("skl-cancer-forest-missing", forest, x)
# The same forest as skl2onnx alone writes it: no covers (every hit rate 1.0).
onx = to_onnx(forest, initial_types=[("X", FloatTensorType([None, x.shape[1]]))], options={"zipmap": False})
with open(os.path.join(OUT, "refused-skl-forest-no-covers.onnx"), "wb") as f:
    f.write(onx.SerializeToString())

# A training profile (the helper's, from every training row) and drift
# references for tests/drift.rs: rows drawn with replacement from the same
# diabetes data, the same with one feature moved by one standard deviation,
# and with a feature's values missing in 30 % of the rows; per feature the
# bin counts (numpy.searchsorted on the profile's edges) and the Population
# Stability Index computed with NumPy from them.
x, y, names = data(load_diabetes)
model = lightgbm.LGBMRegressor(**LGB).fit(x, y, feature_name=names)
profiled = hand_off(model, x[:40], os.path.join(OUT, "lgb-diabetes-profiled"), training=x)
with open(profiled.profile) as f:
    profile = json.load(f)
EPS = 1e-4
draw = numpy.random.default_rng(11)


def numpy_drift(rows):
    counts, index = {}, {}
    for j, n in enumerate(names):
        field = profile["features"][n]
        edges = numpy.asarray(field["edges"], dtype=numpy.float64)
        column = rows[:, j]
        present = column[~numpy.isnan(column)]
        c = numpy.bincount(numpy.searchsorted(edges, present, side="left"), minlength=len(edges) + 1)
        c = numpy.append(c, len(column) - len(present))
        live = numpy.maximum(c / c.sum(), EPS)
        expected = numpy.maximum(numpy.asarray(field["shares"], dtype=numpy.float64), EPS)
        counts[n] = c.tolist()
        index[n] = float(numpy.sum((live - expected) * numpy.log(live / expected)))
    return counts, index


cases = []
bootstrap = x[draw.integers(0, len(x), len(x))]
shifted = bootstrap.copy()
shifted[:, names.index("bmi")] += x[:, names.index("bmi")].std()
holes = bootstrap.copy()
holes[draw.random(len(holes)) < 0.3, names.index("s5")] = numpy.nan
for case, rows in [("bootstrap", bootstrap), ("bmi-shifted", shifted), ("s5-holes", holes)]:
    counts, index = numpy_drift(rows)
    cases.append({"case": case, "rows": [[None if numpy.isnan(v) else float(v) for v in r] for r in rows],
                  "counts": counts, "index": index})
with open(os.path.join(OUT, "drift.json"), "w") as f:
    json.dump({"source": f"NumPy {numpy.__version__}: bins by numpy.searchsorted, index by numpy.sum/log, "
                         f"empty bins as {EPS}", "names": names, "cases": cases,
               "training": [[float(v) for v in r] for r in x]}, f)

# Replay references for tests/cli.rs: the diabetes model above retrained
# with 20 more trees, and both models' own predictions (LightGBM's
# predict) on every training row: a replay of captured traffic against the
# retrained model must find these differences.
retrained = lightgbm.LGBMRegressor(**{**LGB, "n_estimators": LGB["n_estimators"] + 20}).fit(x, y, feature_name=names)
hand_off(retrained, x[:40], os.path.join(OUT, "lgb-diabetes-retrained"))
with open(os.path.join(OUT, "replay.json"), "w") as f:
    json.dump({"source": f"LightGBM {lightgbm.__version__} predict on the 442 diabetes rows",
               "names": names, "rows": [[float(v) for v in r] for r in x],
               "original": [float(v) for v in model.predict(x)],
               "retrained": [float(v) for v in retrained.predict(x)],
               "quantiles": [float(v) for v in numpy.quantile(retrained.predict(x) - model.predict(x),
                                                              [0, 0.01, 0.1, 0.25, 0.5, 0.75, 0.9, 0.99, 1])]}, f)
