"""From a notebook to paddock.

``hand_off(model, rows, stem)`` saves a fitted model in its toolkit's own
format and writes ``rows`` with the toolkit's own predictions as a paddock
checks file, which ``paddock pack MODEL --checks CHECKS`` carries and runs.

Toolkits: XGBoost (``XGBModel`` or ``Booster``; saved as ``STEM.json``),
LightGBM (``LGBMModel`` or ``Booster``; saved as ``STEM.txt``) and
scikit-learn tree-ensemble regressors (DecisionTree, RandomForest,
ExtraTrees, GradientBoosting; saved by skl2onnx as ``STEM.onnx``, whose
float32 leaves hold predictions to about 1e-7 relative: the checks allow
1e-6).

The output names match what paddock's importers call them: ``value`` for a
regression, ``score`` for a margin with no link, ``probability`` for a
binary classifier, ``probability_0``, ``probability_1``… for one
probability per class.
"""
import json
import math
import platform
from collections import namedtuple

import numpy

__all__ = ["hand_off", "HandedOff"]

HandedOff = namedtuple("HandedOff", ["model", "checks", "cases"])

# XGBoost objectives by the output they give (paddock's importer uses the same).
_XGB_VALUE = {"reg:squarederror", "reg:linear", "reg:absoluteerror", "reg:pseudohubererror",
              "reg:squaredlogerror", "count:poisson", "reg:gamma", "reg:tweedie"}
_XGB_SCORE = {"binary:logitraw", "rank:pairwise", "rank:ndcg", "rank:map"}
_XGB_PROBABILITY = {"reg:logistic", "binary:logistic"}
_XGB_CLASSES = {"multi:softprob", "multi:softmax"}

_LGB_VALUE = {"regression", "regression_l2", "regression_l1", "huber", "fair", "quantile", "mape",
              "poisson", "gamma", "tweedie"}
_LGB_SCORE = {"lambdarank", "rank_xendcg", "custom"}
_LGB_PROBABILITY = {"binary", "cross_entropy", "xentropy"}
_LGB_CLASSES = {"multiclass", "softmax", "multiclassova", "multiclass_ova", "ova", "ovr"}


def hand_off(model, rows, stem, *, tolerance=(0.0, 0.0)):
    """Saves ``model`` as its toolkit does and writes its predictions on
    ``rows`` as ``STEM.checks.json``.

    ``tolerance`` is (absolute, relative); the default (0, 0) asks paddock
    for the toolkit's predictions bit for bit, which its importers give.

    Returns ``HandedOff(model=path, checks=path, cases=count)``.
    """
    kind = _toolkit(model)
    matrix, names = _matrix(rows)
    if kind == "xgboost":
        path, outputs, values, source = _xgboost(model, matrix, names, stem)
        names = names or _xgb_names(model, matrix.shape[1])
    elif kind == "sklearn":
        path, outputs, values, source = _sklearn(model, matrix, stem)
        names = [f"x{i}" for i in range(matrix.shape[1])]  # ONNX names no columns
        tolerance = (tolerance[0], max(tolerance[1], 1e-6))
    else:
        path, outputs, values, source = _lightgbm(model, matrix, stem)
        names = names or _lgb_booster(model).feature_name()
    cases = []
    for row, predicted in zip(matrix, values):
        cells = {n: float(v) for n, v in zip(names, row) if not math.isnan(v)}
        cases.append({"row": cells, "expect": {o: float(p) for o, p in zip(outputs, predicted)}})
    checks = {
        "source": f"{source} on {len(cases)} rows (numpy {numpy.__version__}, "
                  f"Python {platform.python_version()}, {platform.machine()})",
        "tolerance": {"abs": float(tolerance[0]), "rel": float(tolerance[1])},
        "cases": cases,
    }
    checks_path = f"{stem}.checks.json"
    with open(checks_path, "w") as f:
        json.dump(checks, f)
    return HandedOff(path, checks_path, len(cases))


def _toolkit(model):
    module = type(model).__module__.split(".")[0]
    if module in ("xgboost", "lightgbm", "sklearn"):
        return module
    raise TypeError(f"hand_off takes an XGBoost, LightGBM or scikit-learn model, not {type(model).__module__}.{type(model).__name__}")


def _matrix(rows):
    names = None
    if hasattr(rows, "columns"):  # a pandas DataFrame
        names = [str(c) for c in rows.columns]
        rows = rows.to_numpy(dtype=numpy.float64, na_value=numpy.nan)
    matrix = numpy.asarray(rows, dtype=numpy.float64)
    if matrix.ndim != 2:
        raise ValueError(f"rows must be 2-D (rows × features), got shape {matrix.shape}")
    return matrix, names


def _outputs(objective, value, score, probability, classes, count):
    if objective in value:
        return ["value"]
    if objective in score:
        return ["score"]
    if objective in probability:
        return ["probability"]
    if objective in classes:
        return [f"probability_{k}" for k in range(count)]
    raise ValueError(f"objective {objective!r}: paddock's importer does not reproduce it")


def _xgboost(model, matrix, names, stem):
    import xgboost

    booster = model.get_booster() if hasattr(model, "get_booster") else model
    config = json.loads(booster.save_config())
    objective = config["learner"]["objective"]["name"]
    classes = int(config["learner"]["learner_model_param"].get("num_class", "0") or 0)
    path = f"{stem}.json"
    booster.save_model(path)
    if objective == "multi:softmax":
        # The artifact gives the class probabilities; XGBoost's own softmax.
        booster = booster.copy()
        booster.set_param({"objective": "multi:softprob"})
    data = xgboost.DMatrix(matrix, missing=numpy.nan, feature_names=names or booster.feature_names)
    predicted = numpy.asarray(booster.predict(data))
    outputs = _outputs(objective, _XGB_VALUE, _XGB_SCORE, _XGB_PROBABILITY, _XGB_CLASSES, classes)
    return path, outputs, predicted.reshape(len(matrix), len(outputs)), f"XGBoost {xgboost.__version__} Booster.predict ({objective})"


def _sklearn(model, matrix, stem):
    import sklearn
    import skl2onnx
    from skl2onnx.common.data_types import FloatTensorType

    onx = skl2onnx.to_onnx(model, initial_types=[("X", FloatTensorType([None, matrix.shape[1]]))])
    path = f"{stem}.onnx"
    with open(path, "wb") as f:
        f.write(onx.SerializeToString())
    predicted = numpy.asarray(model.predict(matrix), dtype=numpy.float64)
    source = f"scikit-learn {sklearn.__version__} {type(model).__name__}.predict (skl2onnx {skl2onnx.__version__})"
    return path, ["value"], predicted.reshape(len(matrix), 1), source


def _xgb_names(model, count):
    booster = model.get_booster() if hasattr(model, "get_booster") else model
    return booster.feature_names or [f"f{i}" for i in range(count)]


def _lgb_booster(model):
    return model.booster_ if hasattr(model, "booster_") else model


def _lightgbm(model, matrix, stem):
    import lightgbm

    booster = _lgb_booster(model)
    path = f"{stem}.txt"
    booster.save_model(path)
    header = {}
    with open(path) as f:
        for line in f:
            if line.startswith("Tree="):
                break
            key, _, value = line.strip().partition("=")
            header[key] = value
    objective = header.get("objective", "").split(" ")[0]
    classes = int(header.get("num_tree_per_iteration", "1"))
    predicted = numpy.asarray(booster.predict(matrix))
    outputs = _outputs(objective, _LGB_VALUE, _LGB_SCORE, _LGB_PROBABILITY, _LGB_CLASSES, classes)
    return path, outputs, predicted.reshape(len(matrix), len(outputs)), f"LightGBM {lightgbm.__version__} Booster.predict ({objective})"
