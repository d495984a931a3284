"""A classifier of scikit-learn's bundled handwritten digits, written as ONNX with onnx.helper.

A multinomial logistic regression fitted with scikit-learn on one part of
the digits (open data the package ships), written as MatMul + Add + Softmax
(ONNX operator spec) from its coefficients, with no converter. The rest of
the rows are split into a validation set (to calibrate and choose decision
thresholds on) and a test set (to check that they hold), saved as .npz in
onnxcal's layout (one array per input plus ``labels``).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper


@dataclass(frozen=True)
class Digits:
    model: Path
    val: Path
    test: Path
    test_probabilities: np.ndarray  # scikit-learn's own predict_proba on the test rows


def make_digits(directory: Path, seed: int = 0) -> Digits:
    """Fit, write the model and the two sets into ``directory``; checked against scikit-learn's outputs."""
    from sklearn.datasets import load_digits
    from sklearn.linear_model import LogisticRegression

    x, y = load_digits(return_X_y=True)
    x = (x / 16.0).astype(np.float32)
    order = np.random.default_rng(seed).permutation(len(y))
    train, val, test = order[:400], order[400:1100], order[1100:]
    # weak regularisation on few rows: an overconfident model, as calibration finds them
    clf = LogisticRegression(C=50.0, max_iter=5000).fit(x[train], y[train])
    nodes = [
        helper.make_node("MatMul", ["pixels", "w"], ["xw"], name="matmul"),
        helper.make_node("Add", ["xw", "b"], ["logits"], name="add"),
        helper.make_node("Softmax", ["logits"], ["probabilities"], name="softmax", axis=1),
    ]
    inits = [numpy_helper.from_array(clf.coef_.T.astype(np.float32), "w"),
             numpy_helper.from_array(clf.intercept_.astype(np.float32), "b")]
    g = helper.make_graph(nodes, "digits", [helper.make_tensor_value_info("pixels", TensorProto.FLOAT, ["N", 64])],
                          [helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, ["N", 10])], inits)
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    paths = Digits(directory / "digits.onnx", directory / "digits_val.npz", directory / "digits_test.npz",
                   clf.predict_proba(x[test]))
    paths.model.write_bytes(model.SerializeToString())
    np.savez(paths.val, pixels=x[val], labels=y[val].astype(np.int64))
    np.savez(paths.test, pixels=x[test], labels=y[test].astype(np.int64))
    return paths
