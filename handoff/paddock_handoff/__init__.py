"""From a notebook to paddock.

``hand_off(model, rows, stem)`` saves a fitted model in its toolkit's own
format and writes ``rows`` with the toolkit's own predictions as a paddock
checks file, which ``paddock pack MODEL --checks CHECKS`` carries and runs.

Toolkits: XGBoost (``XGBModel`` or ``Booster``; saved as ``STEM.json``),
LightGBM (``LGBMModel`` or ``Booster``; saved as ``STEM.txt``) and
scikit-learn tree ensembles and linear models (DecisionTree, RandomForest,
ExtraTrees, GradientBoosting, HistGradientBoosting regressors and
classifiers; LinearRegression, Ridge, Lasso, LogisticRegression…; saved by
skl2onnx as ``STEM.onnx``). skl2onnx writes leaves and coefficients as
float32, so the checks allow what that rounding can move a prediction: ε =
(|base| + Σ largest |leaf| per tree) · 2⁻²⁴ for trees, (|intercept| + Σ
|weight·x|) · 2⁻²³ for linear models, absolute for values and 2ε relative
for probabilities through a logistic or softmax link (plus 2⁻⁴⁹ for the
link's last bit). HistGradientBoosting is written with its doubles
(``_as_tensor`` attributes): its scores are scikit-learn's bit for bit.

The output names match what paddock's importers call them: ``value`` for a
regression, ``score`` for a margin with no link, ``probability`` for a
binary classifier, ``probability_0``, ``probability_1``… for one
probability per class.
"""
import json
import os
import math
import platform
from collections import namedtuple

import numpy

__all__ = ["hand_off", "HandedOff"]

HandedOff = namedtuple("HandedOff", ["model", "checks", "cases", "overrides", "profile"])

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


def hand_off(model, rows, stem, *, tolerance=(0.0, 0.0), names=None, name=None, version=None, training=None):
    """Saves ``model`` as its toolkit does and writes its predictions on
    ``rows`` as ``STEM.checks.json``.

    ``rows`` is a 2-D array or a pandas DataFrame as people have them:
    columns in any order (matched by name to the columns the model was
    fitted on), nullable dtypes (``Int64``, ``Float64``, ``boolean``; a
    missing value is an absent feature), and, for LightGBM, categorical or
    string columns (the checks carry the labels, which the model file keeps).
    ``name`` and ``version`` are the model's in the store: written to
    ``STEM.toml``, the overrides ``paddock pack --overrides`` reads.

    ``tolerance`` is (absolute, relative); the default (0, 0) asks paddock
    for the toolkit's predictions bit for bit, which its importers give.
    ``names`` names the columns of ``rows`` when it is a plain array (a
    DataFrame's columns, or the names a scikit-learn model was fitted on,
    are used otherwise). An ONNX file names no columns: for a scikit-learn
    model with names, ``STEM.toml`` is written too, paddock overrides
    naming the file's ``x0``, ``x1``… for ``paddock pack --overrides``.

    ``training``, the rows the model was trained on (as ``rows`` are
    given), adds ``STEM.profile.json``: how they and the model's
    predictions on them were spread (see ``_profile``), which ``paddock
    pack --profile`` carries so hosts can compare live inputs with it.

    ``STEM``'s folder is created when it does not exist.

    Returns ``HandedOff(model=path, checks=path, cases=count,
    overrides=path or None, profile=path or None)``.
    """
    kind = _toolkit(model)
    os.makedirs(os.path.dirname(stem) or ".", exist_ok=True)
    given = names
    matrix, names, labels = _matrix(rows, names, _fitted_names(model, kind), _categories(model, kind))
    checked = len(matrix)
    if training is not None:
        # Predicted in the same call as the checks' rows, then split off.
        train, _, train_labels = _matrix(training, given, _fitted_names(model, kind), _categories(model, kind))
        matrix = numpy.vstack([matrix, train])
    overrides = None
    if kind == "xgboost":
        path, outputs, values, source = _xgboost(model, matrix, names, stem)
        names = names or _xgb_names(model, matrix.shape[1])
    elif kind == "sklearn":
        path, outputs, values, source, (eps, linked) = _sklearn(model, matrix, stem)
        names = names or [str(n) for n in getattr(model, "feature_names_in_", [])]
        if names:
            overrides = _overrides(names, stem, name, version)
        # The checks use the file's names (ONNX names no columns: x0, x1…), so they
        # pack with or without the overrides; `pack` renames them with the features.
        names = [f"x{i}" for i in range(matrix.shape[1])]
        if linked:
            # 2⁻⁴⁹: scikit-learn's softmax calls numpy's exp, numpy's own
            # (not glibc's) on a CPU with AVX-512: a last bit now and then.
            tolerance = (tolerance[0], max(tolerance[1], 2 * eps + 2.0 ** -49))
        else:
            tolerance = (max(tolerance[0], eps), tolerance[1])
    else:
        path, outputs, values, source = _lightgbm(model, matrix, stem)
        names = names or _lgb_booster(model).feature_name()
    if overrides is None and (name or version):
        overrides = _overrides([], stem, name, version)
    profile = None
    if training is not None:
        profile = _write_profile(stem, matrix[checked:], names, train_labels, outputs, values[checked:], source)
        matrix, values = matrix[:checked], values[:checked]
    cases = []
    for r, (row, predicted) in enumerate(zip(matrix, values)):
        cells = {n: (labels[n][r] if n in labels else float(v)) for n, v in zip(names, row) if not math.isnan(v)}
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
    return HandedOff(path, checks_path, len(cases), overrides, profile)


def _write_profile(stem, matrix, names, labels, outputs, values, source):
    """Writes ``STEM.profile.json``: per feature (by the checks' names) and
    per output, fixed bins and each bin's share of the training rows. A
    number's bin edges are the deciles of its values present
    (``numpy.quantile``, repeated edges dropped); bin ``i`` holds the values
    above edge ``i − 1`` and at most edge ``i`` (``numpy.searchsorted``,
    side left). A label column gets one bin per label seen, one for labels
    never seen (share 0 here) and, like numbers, one for missing values."""
    total = len(matrix)
    if total == 0:
        raise ValueError("training has no rows: a profile needs some")

    def numbers(column):
        present = column[~numpy.isnan(column)]
        if len(present) == 0:
            edges = numpy.empty(0)
        else:
            edges = numpy.unique(numpy.quantile(present, numpy.arange(1, 10) / 10.0))
        counts = numpy.bincount(numpy.searchsorted(edges, present, side="left"), minlength=len(edges) + 1)
        shares = list(counts / total) + [float(total - len(present)) / total]
        field = {"edges": [float(e) for e in edges], "shares": [float(v) for v in shares]}
        if len(present):
            field["summary"] = {"min": float(present.min()), "max": float(present.max()),
                                "mean": float(present.mean()), "sd": float(present.std())}
        return field

    def texts(column):
        seen = sorted({v for v in column if v is not None})
        counts = [sum(1 for v in column if v == label) for label in seen]
        missing = sum(1 for v in column if v is None)
        return {"labels": seen, "shares": [c / total for c in counts] + [0.0, missing / total]}

    features = {n: texts(labels[n]) if n in labels else numbers(matrix[:, j]) for j, n in enumerate(names)}
    outputs = {o: numbers(numpy.asarray(values[:, k], dtype=numpy.float64)) for k, o in enumerate(outputs)}
    doc = {"source": f"paddock_handoff from {total} training rows; outputs by {source} "
                     f"(numpy {numpy.__version__}, Python {platform.python_version()})",
           "rows": total, "features": features, "outputs": outputs}
    path = f"{stem}.profile.json"
    with open(path, "w") as f:
        json.dump(doc, f)
    return path


def _toolkit(model):
    module = type(model).__module__.split(".")[0]
    if module in ("xgboost", "lightgbm", "sklearn"):
        return module
    raise TypeError(f"hand_off takes an XGBoost, LightGBM or scikit-learn model, not {type(model).__module__}.{type(model).__name__}")


def _overrides(names, stem, name=None, version=None):
    """paddock overrides: the model's name and version in the store, and
    the names of an ONNX file's columns x0, x1…"""
    path = f"{stem}.toml"
    with open(path, "w") as f:
        f.write("# Written by paddock_handoff for `paddock pack --overrides`.\n")
        if name:
            f.write(f"name = {json.dumps(str(name))}\n")
        if version:
            f.write(f"version = {json.dumps(str(version))}\n")
        if names:
            f.write("# The ONNX file names no columns: these are the columns the model was fitted on, in order.\n")
        for i, column in enumerate(names):
            f.write(f"\n[features.x{i}]\nname = {json.dumps(column)}\n")
    return path


def _fitted_names(model, kind):
    """The columns the model was fitted on, in its order, if it knows them."""
    if kind == "sklearn":
        names = getattr(model, "feature_names_in_", None)
    elif kind == "xgboost":
        names = (model.get_booster() if hasattr(model, "get_booster") else model).feature_names
    else:
        names = _lgb_booster(model).feature_name()
        names = None if names and all(n == f"Column_{i}" for i, n in enumerate(names)) else names
    return [str(n) for n in names] if names is not None and len(names) else None


def _categories(model, kind):
    """LightGBM's category labels per categorical column, in column order
    (what it saves as ``pandas_categorical``), or None."""
    if kind != "lightgbm":
        return None
    return getattr(_lgb_booster(model), "pandas_categorical", None) or None


def _matrix(rows, names=None, fitted=None, categories=None):
    """(matrix of floats, column names, labels): a DataFrame's columns
    matched to ``fitted`` by name, categories turned into LightGBM's codes
    (their position among the labels it saved) with the labels kept for
    the checks, nullable values turned into NaN."""
    names = list(names) if names is not None else None
    labels = {}
    if hasattr(rows, "columns"):  # a pandas DataFrame
        frame = rows
        if fitted is not None and list(map(str, frame.columns)) != fitted:
            missing = [n for n in fitted if n not in set(map(str, frame.columns))]
            if missing:
                raise ValueError(f"the rows lack the column(s) the model was fitted on: {', '.join(missing)}")
            frame = frame[[c for n in fitted for c in frame.columns if str(c) == n]]
        names = names or [str(c) for c in frame.columns]
        columns = []
        text_columns = iter(categories or [])
        for column_name, column in zip(names, (frame[c] for c in frame.columns)):
            if _is_text(column):
                known = next(text_columns, None)
                if known is None:
                    raise ValueError(f"column {column_name!r} holds categories or text; only LightGBM keeps "
                                     "category labels in its model file: encode it as numbers for this toolkit")
                import pandas
                coded = pandas.Categorical(column.astype(object).where(column.notna(), None), categories=known)
                codes = numpy.asarray(coded.codes, dtype=numpy.float64)
                codes[codes < 0] = numpy.nan
                # LightGBM splits an ordered category on its code, like a number.
                if not getattr(getattr(column, "cat", None), "ordered", False):
                    labels[column_name] = [None if c < 0 else str(known[c]) for c in coded.codes]
                columns.append(codes)
            else:
                columns.append(column.astype("Float64").to_numpy(dtype=numpy.float64, na_value=numpy.nan))
        rows = numpy.column_stack(columns) if columns else numpy.empty((len(frame), 0))
    matrix = numpy.asarray(rows, dtype=numpy.float64)
    if matrix.ndim != 2:
        raise ValueError(f"rows must be 2-D (rows × features), got shape {matrix.shape}")
    if names is not None and len(names) != matrix.shape[1]:
        raise ValueError(f"{len(names)} names for {matrix.shape[1]} columns")
    return matrix, names, labels


def _is_text(column):
    """Whether a DataFrame column holds categories or strings."""
    import pandas
    dtype = column.dtype
    return isinstance(dtype, pandas.CategoricalDtype) or pandas.api.types.is_string_dtype(dtype) \
        or dtype == object


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
    from skl2onnx.common.data_types import DoubleTensorType, FloatTensorType

    name = type(model).__name__
    # HistGradientBoosting compares double inputs with double thresholds; the
    # other trees compare float32 inputs, and skl2onnx writes linear models
    # as ai.onnx.ml operators only for a float input.
    hist = name.startswith("HistGradientBoosting")
    tensor = DoubleTensorType if hist else FloatTensorType
    options = {"zipmap": False} if hasattr(model, "predict_proba") else None
    with _plain_attributes(hist):
        onx = skl2onnx.to_onnx(model, initial_types=[("X", tensor([None, matrix.shape[1]]))], options=options)
    if hist:
        _exact_hist(onx, model)
    else:
        _missing_routes(onx, model)
    _covers(onx, model, hist)
    path = f"{stem}.onnx"
    with open(path, "wb") as f:
        f.write(onx.SerializeToString())
    data = matrix
    fitted = getattr(model, "feature_names_in_", None)
    if fitted is not None:  # fitted on a DataFrame: predict on one, as the notebook did
        import pandas
        data = pandas.DataFrame(matrix, columns=fitted)
    if hasattr(model, "predict_proba"):
        predicted, method = numpy.asarray(model.predict_proba(data), dtype=numpy.float64), "predict_proba"
        if predicted.shape[1] == 2:
            outputs, predicted = ["probability"], predicted[:, 1:]
        else:
            outputs = [f"probability_{k}" for k in range(predicted.shape[1])]
    elif hasattr(model, "decision_function") and hasattr(model, "classes_"):
        predicted, method = numpy.asarray(model.decision_function(data), dtype=numpy.float64), "decision_function"
        predicted = predicted.reshape(len(matrix), -1)
        outputs = ["score"] if predicted.shape[1] == 1 else [f"score_{k}" for k in range(predicted.shape[1])]
    else:
        predicted, method = numpy.asarray(model.predict(data), dtype=numpy.float64), "predict"
        predicted = predicted.reshape(len(matrix), -1)
        outputs = ["value"] if predicted.shape[1] == 1 else [f"value_{k}" for k in range(predicted.shape[1])]
    source = f"scikit-learn {sklearn.__version__} {name}.{method} (skl2onnx {skl2onnx.__version__})"
    return path, outputs, predicted.reshape(len(matrix), len(outputs)), source, _rounding(onx, matrix)


def _rounding(onx, matrix):
    """(ε, linked): how far the file's float32 values can move a score from
    scikit-learn's, and whether a logistic or softmax link follows."""
    from onnx import helper

    ops = ("TreeEnsembleRegressor", "TreeEnsembleClassifier", "LinearRegressor", "LinearClassifier")
    node = next(n for n in onx.graph.node if n.op_type in ops)
    a = {x.name: helper.get_attribute_value(x) for x in node.attribute}
    linked = a.get("post_transform", b"NONE") not in (b"NONE", "NONE")
    if node.op_type.startswith("Linear"):
        w = numpy.abs(numpy.asarray(a["coefficients"], dtype=numpy.float64)).reshape(-1, matrix.shape[1])
        b = numpy.abs(numpy.asarray(a.get("intercepts", [0.0] * len(w)), dtype=numpy.float64))
        x = numpy.abs(numpy.nan_to_num(matrix))
        return float((b[None, :] + x @ w.T).max()) * 2.0 ** -23, linked
    prefix = "class" if node.op_type.endswith("Classifier") else "target"
    if f"{prefix}_weights" not in a:  # doubles, as _exact_hist writes them
        return 0.0, linked
    largest = {}
    for tree, weight in zip(a[f"{prefix}_treeids"], a[f"{prefix}_weights"]):
        largest[tree] = max(largest.get(tree, 0.0), abs(weight))
    leaves = sum(largest.values())
    if a.get("aggregate_function", b"SUM") in (b"AVERAGE", "AVERAGE"):
        leaves /= max(len(largest), 1)
    base = max((abs(v) for v in a.get("base_values", [0.0])), default=0.0)
    return (base + leaves) * 2.0 ** -24, linked


def _sklearn_trees(model):
    """The fitted trees (``tree_``) of a scikit-learn tree model, in the
    order skl2onnx numbers them, or None for a model without them."""
    if hasattr(model, "tree_"):
        return [model.tree_]
    estimators = getattr(model, "estimators_", None)
    if estimators is None:
        return None
    flat = numpy.ravel(numpy.asarray(estimators, dtype=object))
    trees = [getattr(e, "tree_", None) for e in flat]
    return None if any(t is None for t in trees) else trees


def _tree_node(onx):
    """The graph's tree ensemble node and its attributes by name, or None."""
    node = next((n for n in onx.graph.node if n.op_type.startswith("TreeEnsemble")), None)
    return (node, {a.name: a for a in node.attribute}) if node is not None else (None, None)


def _file_nodes(onx, trees):
    """The (tree, node) of the model's ``tree_`` for each node the file
    lists, after checking that they are the model's (same feature at each
    split, same leaves); None for a file laid out otherwise."""
    from onnx import helper

    node, attrs = _tree_node(onx)
    if trees is None or node is None:
        return None
    value = lambda name: list(helper.get_attribute_value(attrs[name]))
    modes = [m.decode() if isinstance(m, bytes) else m for m in value("nodes_modes")]
    at = []
    for t, n, f, mode in zip(value("nodes_treeids"), value("nodes_nodeids"), value("nodes_featureids"), modes):
        if t >= len(trees) or n >= trees[t].node_count:
            return None
        tree = trees[t]
        leaf = tree.children_left[n] == -1
        if leaf != (mode == "LEAF") or (not leaf and (tree.feature[n] != f or mode != "BRANCH_LEQ")):
            return None
        at.append((tree, n))
    return at


def _replace(node, attrs, name, attribute):
    if name in attrs:
        node.attribute.remove(attrs[name])
    node.attribute.append(attribute)


def _missing_routes(onx, model):
    """scikit-learn's trees (≥ 1.3) send an absent value (NaN) down each
    split's ``missing_go_to_left`` side, whether or not they were fitted on
    missing values; skl2onnx 1.20 writes no such route
    (``nodes_missing_value_tracks_true`` all 0). Each split's route is
    written from the model itself (see ``_file_nodes``); a file laid out
    otherwise is left as written, and paddock then requires every
    feature."""
    from onnx import helper

    trees = _sklearn_trees(model)
    at = _file_nodes(onx, trees)
    if at is None or not all(hasattr(t, "missing_go_to_left") for t in trees):
        return
    routes = [0 if tree.children_left[n] == -1 else int(tree.missing_go_to_left[n]) for tree, n in at]
    node, attrs = _tree_node(onx)
    name = "nodes_missing_value_tracks_true"
    _replace(node, attrs, name, helper.make_attribute(name, routes))


def _covers(onx, model, hist):
    """Each node's cover, the training weight that reached it, which
    per-row contributions need (the path-dependent algorithm of Lundberg et
    al.): scikit-learn's ``tree_.weighted_n_node_samples``, or each
    HistGradientBoosting node's ``count``. skl2onnx writes 1.0 for every
    node's hit rate (``nodes_hitrates``), the ONNX-ML attribute for how
    often a node is reached; the covers are written there instead, as
    doubles (``nodes_hitrates_as_tensor``). A file laid out otherwise is
    left as written, and paddock then declines to explain it."""
    from onnx import helper, numpy_helper

    node, attrs = _tree_node(onx)
    if node is None:
        return
    ids = zip(attrs["nodes_treeids"].ints, attrs["nodes_nodeids"].ints)
    if hist:
        trees = [p.nodes for stage in model._predictors for p in stage]
        covers = [float(trees[t][n]["count"]) for t, n in ids]
    else:
        at = _file_nodes(onx, _sklearn_trees(model))
        if at is None:
            return
        covers = [float(tree.weighted_n_node_samples[n]) for tree, n in at]
    name = "nodes_hitrates_as_tensor"
    tensor = numpy_helper.from_array(numpy.asarray(covers, dtype=numpy.float64), name)
    _replace(node, attrs, "nodes_hitrates", helper.make_attribute(name, tensor))
    _ml_opset(onx, 3)


def _ml_opset(onx, version):
    """Raises the file's ai.onnx.ml opset to at least ``version`` (the
    ``_as_tensor`` attributes are ai.onnx.ml 3's)."""
    for opset in onx.opset_import:
        if opset.domain == "ai.onnx.ml":
            opset.version = max(opset.version, version)


def _exact_hist(onx, model):
    """skl2onnx writes HistGradientBoosting's double thresholds, leaf
    values and baseline rounded to float32, so a value within a rounding
    of a threshold could go the other way, and sums differ in the last
    bits. The ONNX-ML operators (ai.onnx.ml 3) also take them as double
    tensors (``nodes_values_as_tensor``…): they are written so, from the
    model itself, each checked to round to the float the converter wrote."""
    from onnx import helper, numpy_helper

    node = next(n for n in onx.graph.node if n.op_type.startswith("TreeEnsemble"))
    prefix = "class" if node.op_type.endswith("Classifier") else "target"
    attrs = {a.name: a for a in node.attribute}
    trees = [p.nodes for stage in model._predictors for p in stage]

    def exact(name, doubles):
        written = numpy.asarray(helper.get_attribute_value(attrs[name]), dtype=numpy.float32)
        doubles = numpy.asarray(doubles, dtype=numpy.float64)
        if written.shape != doubles.shape or not numpy.array_equal(doubles.astype(numpy.float32), written):
            raise ValueError(f"{name}: the converter's float32 values are not this model's doubles rounded; "
                             "this skl2onnx version lays trees out differently")
        node.attribute.remove(attrs[name])
        node.attribute.append(helper.make_attribute(f"{name}_as_tensor", numpy_helper.from_array(doubles, f"{name}_as_tensor")))

    tree_ids, node_ids = attrs["nodes_treeids"].ints, attrs["nodes_nodeids"].ints
    exact("nodes_values", [0.0 if trees[t][n]["is_leaf"] else trees[t][n]["num_threshold"] for t, n in zip(tree_ids, node_ids)])
    exact(f"{prefix}_weights", [trees[t][n]["value"] for t, n in zip(attrs[f"{prefix}_treeids"].ints, attrs[f"{prefix}_nodeids"].ints)])
    if "base_values" in attrs:
        exact("base_values", numpy.ravel(model._baseline_prediction))
    _ml_opset(onx, 3)


class _plain_attributes:
    """skl2onnx 1.20 passes HistGradientBoosting's missing-value flags to
    onnx as numpy booleans, which onnx ≥ 1.17 refuses ("Expected an int,
    got a boolean"). While converting one, node attributes are made plain
    Python ints; nothing else changes."""

    def __init__(self, active):
        self.active = active

    def __enter__(self):
        if not self.active:
            return
        from skl2onnx.common import _container

        self.cls = _container.ModelComponentContainer
        self.original = self.cls.add_node
        original = self.original

        def plain(value):
            if isinstance(value, list):
                return [int(v) if isinstance(v, (bool, numpy.bool_, numpy.integer)) else v for v in value]
            return value

        def add_node(container, *args, **attrs):
            return original(container, *args, **{k: plain(v) for k, v in attrs.items()})

        self.cls.add_node = add_node

    def __exit__(self, *exc):
        if self.active:
            self.cls.add_node = self.original
        return False


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
