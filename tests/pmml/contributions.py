#!/usr/bin/env python3
"""Per-row contributions of the scikit-learn trees tests/pmml/export.py
exported as PMML, from the `shap` package's path-dependent tree explainer
(PyPI `shap`, TreeExplainer(feature_perturbation="tree_path_dependent")),
for tests/pmml.rs:

    python3 tests/pmml/contributions.py OUT_DIR

export.py runs in an environment of its own (nyoka needs scikit-learn
1.3), where `shap` does not install; it writes each model's trees as
`shap`'s tree dictionaries (`STEM.trees.json`), which `shap` explains here
into `STEM.contrib.json`: per row, class after class, the features'
contributions then the baseline.
"""
import glob
import json
import os
import sys

import numpy
import shap

OUT = sys.argv[1]
for path in sorted(glob.glob(os.path.join(OUT, "*.trees.json"))):
    with open(path) as f:
        doc = json.load(f)
    trees = [{k: numpy.asarray(v) for k, v in t.items()} for t in doc["trees"]]
    # scikit-learn compares float32 inputs with its double thresholds.
    model = {"trees": trees, "input_dtype": numpy.float32, "internal_dtype": numpy.float64, "tree_output": "raw_value"}
    explainer = shap.TreeExplainer(model, feature_perturbation="tree_path_dependent")
    x = numpy.asarray(doc["rows"], dtype=numpy.float64)
    values = numpy.asarray(explainer.shap_values(x), dtype=numpy.float64)
    expected = numpy.atleast_1d(numpy.asarray(explainer.expected_value, dtype=numpy.float64))
    if values.ndim == 2:
        values = values[:, :, None]
    blocks = [numpy.column_stack([values[:, :, k], numpy.full(len(x), expected[k])]) for k in range(values.shape[2])]
    stem = path[: -len(".trees.json")]
    with open(stem + ".contrib.json", "w") as f:
        json.dump({"source": f"shap {shap.__version__} TreeExplainer (tree_path_dependent) of {doc['source']}'s trees",
                   "names": doc["names"], "x": x.tolist(), "contrib": numpy.hstack(blocks).tolist()}, f)
print(f"contributions of {OUT}'s trees from shap {shap.__version__}")
