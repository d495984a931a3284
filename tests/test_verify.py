"""The NumPy reference and the checks built on it."""

import numpy as np
import pytest
import scipy.special

from onnxcal.graph import FoldedValues
from onnxcal.scaling import Scaling
from onnxcal.verify import compare, folded_record_check, record_check, reference_probabilities, source_check


def test_reference_matches_scipy(rng):
    # Reference library: scipy.special.softmax / log_softmax / expit.
    z = rng.normal(scale=5, size=(40, 6)).astype(np.float32)
    np.testing.assert_allclose(
        reference_probabilities(z, 2.0, "softmax"), scipy.special.softmax(z / 2.0, axis=1), rtol=1e-6
    )
    np.testing.assert_allclose(
        reference_probabilities(z, 2.0, "logsoftmax"),
        scipy.special.log_softmax(z.astype(np.float64) / 2.0, axis=1),
        rtol=1e-12,
    )
    np.testing.assert_allclose(
        reference_probabilities(z, 2.0, "sigmoid"), scipy.special.expit(z / 2.0), rtol=1e-6
    )


def test_compare_passes_exact_and_fails_wrong_temperature(rng):
    z = rng.normal(scale=3, size=(100, 5))
    good = scipy.special.softmax(z / 1.5, axis=1).astype(np.float32)
    checks = {c.name: c for c in compare(good, z, 1.5, "softmax", "float32")}
    assert all(c.passed for c in checks.values())
    wrong = scipy.special.softmax(z / 1.6, axis=1).astype(np.float32)
    checks = {c.name: c for c in compare(wrong, z, 1.5, "softmax", "float32")}
    assert not checks["reference"].passed and checks["reference"].value > 1e-3
    assert checks["argmax"].passed  # a wrong T still keeps the argmax


def test_compare_flags_bad_row_sums_and_argmax(rng):
    z = rng.normal(size=(50, 3))
    p = scipy.special.softmax(z, axis=1)
    swapped = p[:, ::-1].copy()
    checks = {c.name: c for c in compare(swapped, z, 1.0, "softmax", "float32")}
    assert not checks["argmax"].passed and checks["row-sums"].passed
    scaled = {c.name: c for c in compare(p * 1.01, z, 1.0, "softmax", "float32")}
    assert not scaled["row-sums"].passed


def test_rounding_ties_are_no_argmax_failure():
    # Found by tests/test_properties.py: float16 rounds both probabilities of
    # logits (0, 1e-4) to 0.5, so the output's argmax (0) differs from the
    # reference's (1) although the patch is exact.
    z = np.array([[0.0, 1e-4], [2.0, 0.0]])
    got = scipy.special.softmax(z, axis=1).astype(np.float16)
    assert got[0, 0] == got[0, 1]
    checks = {c.name: c for c in compare(got, z, 1.0, "softmax", "float16")}
    assert all(c.passed for c in checks.values())
    swapped = got[:, ::-1]  # a real change of decision in row 1 still fails
    assert not {c.name: c for c in compare(swapped, z, 1.0, "softmax", "float16")}["argmax"].passed


def test_sigmoid_decision_at_the_threshold_within_rounding():
    z = np.array([[1e-5], [3.0]])
    got = scipy.special.expit(z).astype(np.float16)  # 0.5000025 rounds to 0.5: "not above 0.5"
    checks = {c.name: c for c in compare(got, z, 1.0, "sigmoid", "float16")}
    assert checks["decisions"].passed
    wrong = 1 - got  # the decision in row 1 flips by far more than rounding
    assert not {c.name: c for c in compare(wrong, z, 1.0, "sigmoid", "float16")}["decisions"].passed


def test_log_probabilities_are_compared_relative_to_their_size():
    # Found by tests/test_properties.py: a float32 log-probability near -400
    # carries about 400 times the rounding of one near 0 (2.4e-5 > 1e-5).
    z = np.array([[10.0, -10.0, 0.0]])
    t = 0.05
    ref = scipy.special.log_softmax(z / t, axis=1)
    got = (ref * (1 + 2.0**-23)).astype(np.float32)  # a couple of float32 rounding steps off
    assert np.max(np.abs(got - ref)) > 1e-5
    check = {c.name: c for c in compare(got, z, t, "logsoftmax", "float32")}["reference"]
    assert check.passed and check.value < 1e-6
    wrong = scipy.special.log_softmax(z / (t * 1.001), axis=1)  # T off by 0.1 %
    assert not {c.name: c for c in compare(wrong, z, t, "logsoftmax", "float32")}["reference"].passed


def test_sigmoid_decisions(rng):
    z = rng.normal(size=(30, 2))
    p = scipy.special.expit(z / 3.0)
    checks = {c.name: c for c in compare(p, z, 3.0, "sigmoid", "float64")}
    assert checks["decisions"].passed and checks["reference"].passed


def test_record_and_source_checks():
    assert record_check(2.0, 2.0).passed
    assert not record_check(2.0, 2.5).passed
    assert not record_check(2.0, None).passed
    assert source_check("a" * 64, "a" * 64).passed
    assert not source_check("a" * 64, "b" * 64).passed


def test_tolerance_follows_the_coarsest_dtype():
    from onnxcal.verify import TOLERANCE, tolerance

    assert tolerance("float32") == TOLERANCE["float32"]
    assert tolerance(("float16", "float32")) == TOLERANCE["float16"]
    # IEEE 754 binary16 unit roundoff is 2**-11: the limit is a few units, not less.
    assert 2.0**-11 < TOLERANCE["float16"] < 0.01
    assert TOLERANCE["float64"] < TOLERANCE["float32"] < TOLERANCE["float16"] < TOLERANCE["bfloat16"]


def test_record_check_rounds_to_the_initializer_dtype():
    t16 = float(np.float16(1.2345))
    assert record_check(1.2345, t16, "float16").passed  # T held in float16
    assert not record_check(1.2345, t16, "float32").passed
    assert not record_check(1.2345, float(np.float16(1.25)), "float16").passed


def test_reference_for_vector_platt_and_per_label(rng):
    # Reference library: scipy.special.softmax / expit of the calibrated logits.
    z = rng.normal(scale=3, size=(40, 3))
    w, b = np.array([0.5, 1.0, 2.0]), np.array([0.2, 0.0, -0.2])
    vec = Scaling.of_affine(w, b, "vector", "multiclass")
    np.testing.assert_allclose(
        reference_probabilities(z, vec, "softmax"), scipy.special.softmax(z * w + b, axis=1), rtol=1e-12
    )
    platt = Scaling.of_affine(0.7, -0.4, "platt", "binary")
    np.testing.assert_allclose(
        reference_probabilities(z[:, :1], platt, "sigmoid"), scipy.special.expit(0.7 * z[:, :1] - 0.4), rtol=1e-12
    )
    t = np.array([0.5, 1.0, 4.0])
    per = Scaling.of_temperature(t, "multilabel")
    np.testing.assert_allclose(reference_probabilities(z, per, "sigmoid"), scipy.special.expit(z / t), rtol=1e-12)


def test_vector_argmax_is_checked_against_the_reference(rng):
    # Vector scaling may change the argmax; the check compares with the reference's.
    z = rng.normal(scale=1.0, size=(200, 3))
    vec = Scaling.of_affine([1.0, 1.0, 1.0], [0.0, 0.0, 2.0], "vector", "multiclass")
    good = scipy.special.softmax(z + [0.0, 0.0, 2.0], axis=1)
    assert (good.argmax(1) != z.argmax(1)).any()
    checks = {c.name: c for c in compare(good, z, vec, "softmax", "float64")}
    assert all(c.passed for c in checks.values())
    checks = {c.name: c for c in compare(scipy.special.softmax(z, axis=1), z, vec, "softmax", "float64")}
    assert not checks["argmax"].passed and not checks["reference"].passed


def test_record_check_compares_every_parameter():
    recorded = {"w": [1.0, 2.0], "b": [0.5, -0.5]}
    assert record_check(recorded, {"w": np.array([1.0, 2.0]), "b": np.array([0.5, -0.5])}).passed
    assert not record_check(recorded, {"w": np.array([1.0, 2.0]), "b": np.array([0.5, -0.4])}).passed
    assert not record_check(recorded, {"w": np.array([1.0]), "b": np.array([0.5])}).passed


def _found(w, b, residual=0.0, dtype="float32", b_scale=4.0):
    b = np.atleast_2d(np.asarray(b, dtype=np.float64))
    return FoldedValues(np.asarray(w, dtype=np.float64), b, np.full(b.shape, b_scale), residual, dtype)


def test_folded_record_check_allows_the_weights_rounding_only():
    vec = Scaling.of_affine([0.5, 2.0], [0.25, -1.0], "vector", "multiclass")
    u = 2.0**-24  # float32 unit roundoff (IEEE 754 binary32)
    assert folded_record_check(vec, _found([0.5, 2.0], [0.25, -1.0])).passed
    # w off by one rounding relative to w, b by one relative to the bias terms (4.0).
    assert folded_record_check(vec, _found([0.5 * (1 + u), 2.0], [0.25, -1.0 + 4 * u])).passed
    assert not folded_record_check(vec, _found([0.5 * (1 + 1e-5), 2.0], [0.25, -1.0])).passed
    assert folded_record_check(vec, _found([0.5 * (1 + 1e-5), 2.0], [0.25, -1.0], dtype="float16")).passed
    assert not folded_record_check(vec, _found([0.5, 2.0], [0.25, -1.0 + 4e-5])).passed
    # Weights that are not a per-class multiple of the original's.
    assert not folded_record_check(vec, _found([0.5, 2.0], [0.25, -1.0], residual=1e-5)).passed
    assert not folded_record_check(vec, _found([0.5, 2.0, 1.0], [0.25, -1.0, 0.0])).passed
    assert not folded_record_check(vec, None).passed
    # Temperature scaling is w = 1/T, b = 0; an offset in the bias is caught.
    t = Scaling.of_temperature(2.0)
    assert folded_record_check(t, _found([0.5], [0.0, 0.0])).passed
    assert not folded_record_check(t, _found([0.5], [0.0, 1e-3])).passed
    assert not folded_record_check(t, _found([float("nan")], [0.0])).passed  # a zero weight column


# --------------------------------------------------------------------------
# The CI gate: thresholds, latency, JUnit XML


def _metrics(**values):
    from onnxcal.metrics import Metrics

    base = dict(n=100, nll=0.5, ece=0.05, mce=0.2, adaptive_ece=0.05, classwise_ece=0.03, brier=0.3,
                accuracy=0.9, mean_confidence=0.92, gap=0.02)
    return Metrics(**{**base, **values})


def test_threshold_checks_hold_each_bound():
    from onnxcal.verify import threshold_checks

    m = _metrics()
    assert threshold_checks(m) == ()
    checks = {c.name: c for c in threshold_checks(m, max_ece=0.06, max_nll=0.5, min_accuracy=0.9)}
    assert all(c.passed for c in checks.values())  # bounds are inclusive
    assert checks["max-ece"].value == 0.05 and checks["max-ece"].limit == 0.06
    checks = {c.name: c for c in threshold_checks(m, max_ece=0.04, max_nll=0.49, min_accuracy=0.91)}
    assert not any(c.passed for c in checks.values())
    assert not threshold_checks(_metrics(ece=float("nan")), max_ece=1.0)[0].passed


def test_time_alternately_interleaves_and_reverses():
    from onnxcal.verify import time_alternately

    calls = []
    times = time_alternately([lambda: calls.append("a"), lambda: calls.append("b")], repeats=4, warmup=1)
    assert times.shape == (2, 4) and np.all(times >= 0)
    assert "".join(calls) == "ab" + "ab" + "ba" + "ab" + "ba"  # warm-up, then A B, B A, ...
    calls.clear()
    time_alternately([lambda c=c: calls.append(c) for c in "abc"], repeats=3, warmup=0)
    assert "".join(calls) == "abc" + "bca" + "cab"  # each in each position once
    calls.clear()
    time_alternately([lambda: calls.append("a"), lambda: calls.append("b")], repeats=2, warmup=0, start=3)
    assert "".join(calls) == "ba" + "ab"  # a continuation after 3 rounds goes on with the order: B A, A B


def test_latency_check_ratio_and_limit():
    from onnxcal.verify import latency_check

    a = np.tile([1.0, 2.0, 3.0, 1.0], 5)  # 20 rounds: 10 pairs (A B, B A)
    b = 2.0 * a
    b[2] = 300.0  # one outlier: the median of the per-pair ratios ignores it
    c = latency_check(a, b, None, batch=8)
    assert c.value == pytest.approx(2.0) and c.passed and c.limit is None and "batch of 8" in c.detail
    assert "95% interval 2.000 to 2.000" in c.detail and "10 pairs" in c.detail
    failed = latency_check(a, b, 1.5, batch=8)  # the whole interval above the limit
    assert not failed.passed and failed.status == "fail" and "whole interval lies above" in failed.detail
    assert latency_check(a, b, 2.0, batch=8).status == "pass"


def test_latency_ratio_cancels_an_effect_of_the_place_in_a_round():
    """Same model twice, but the second call of each round is 40 % slower (the other session's idle threads
    or cache): per-round ratios are 1.4 and 1 / 1.4 by turns; each pair of rounds (A B, B A) holds both
    places for both models, so its ratio is 1 (a balanced crossover design, common practice)."""
    from onnxcal.verify import latency_check, latency_ratio

    rng = np.random.default_rng(5)
    base = rng.lognormal(-9.0, 0.02, size=100)
    second = np.where(np.arange(100) % 2 == 0, 1.4, 1.0)  # round r: A B when r is even, B A when odd
    original, patched = base * (2.4 - second), base * second  # original second when r is odd
    r = latency_ratio(original, patched)
    assert r.ratio == pytest.approx(1.0, abs=0.03) and r.low <= 1.0 <= r.high * 1.03
    assert r.high < 1.05  # narrow: per-round ratios would give an interval from about 0.71 to 1.4
    assert latency_check(original, patched, 1.05, batch=1).status == "pass"  # decided, not undecided


def test_median_interval_from_order_statistics():
    from scipy.stats import binom

    from onnxcal.verify import median_interval

    x = np.arange(10.0)[::-1]
    # n = 10 at 95 %: (X(2), X(9)), coverage 1 - 2 P(B <= 1) = 1 - 22/1024 (Conover 1999, section 3.2;
    # the tail by hand: (1 + 10) / 2^10)
    assert median_interval(x) == (1.0, 8.0)
    assert 1 - 2 * binom.cdf(1, 10, 0.5) == pytest.approx(1 - 22 / 1024)
    assert median_interval(np.arange(5.0)) == (-np.inf, np.inf)  # 2 / 2^5 > 0.05: no interval from 5 values
    assert median_interval(np.arange(6.0)) == (0.0, 5.0)  # 2 / 2^6 = 0.031 <= 0.05
    # coverage on skewed data, as timings are: at least 95 % (simulation, 2000 samples of 40)
    rng = np.random.default_rng(0)
    draws = rng.lognormal(0.0, 1.0, size=(2000, 40))
    bounds = np.array([median_interval(d) for d in draws])
    covered = (bounds[:, 0] <= 1.0) & (1.0 <= bounds[:, 1])  # the lognormal(0, 1) median is e^0 = 1
    assert covered.mean() >= 0.94


def test_latency_noise_is_undecided_not_failed():
    """Two runs of the same model: a limit just above 1 is never failed, only passed or undecided."""
    from onnxcal.verify import latency_check, latency_ratio

    rng = np.random.default_rng(3)
    for _ in range(200):
        base = rng.lognormal(-7.0, 0.3, size=100)
        same = base * rng.lognormal(0.0, 0.05, size=100)  # the same model: per-round noise only
        c = latency_check(base, same, 1.01, batch=1)
        assert c.passed and c.status in ("pass", "undecided")
    c = latency_check(base, same, 1.0, batch=1)
    assert c.status == "undecided" and c.detail.startswith("undecided: the interval holds the limit 1")
    assert latency_ratio(base, same).decided(1.0) is False
    # a model 20 % slower is failed against 1.05, whatever the noise
    assert not latency_check(base, base * 1.2 * rng.lognormal(0.0, 0.05, size=100), 1.05, batch=1).passed


def test_junit_xml_has_one_testcase_per_check():
    # The layout CI systems read: testsuites > testsuite > testcase > failure | skipped
    # (the JUnit XML convention of Ant's junitreport, common practice).
    import xml.etree.ElementTree as ET

    from onnxcal.junit import junit_xml
    from onnxcal.verify import Check, VerifyResult, skipped

    result = VerifyResult(
        checks=(
            Check("reference", True, 1e-7, 1e-5, "max |patched - softmax(logits / 2)|"),
            Check("max-ece", False, 0.08, 0.05, "ECE <b>& more</b>"),
            skipped("source", "no original model"),
        ),
        n=10,
        original="m.onnx",
        notes=("a note",),
    )
    root = ET.fromstring(junit_xml(result, suite="onnxcal verify p.onnx", elapsed=1.5))
    assert root.tag == "testsuites" and root.get("tests") == "3" and root.get("failures") == "1"
    (suite,) = root.findall("testsuite")
    assert suite.get("name") == "onnxcal verify p.onnx" and suite.get("skipped") == "1" and suite.get("errors") == "0"
    assert float(suite.get("time")) == 1.5 and suite.get("timestamp")
    cases = suite.findall("testcase")
    assert [c.get("name") for c in cases] == ["reference", "max-ece", "source"]
    assert all(c.get("classname") == "onnxcal verify p.onnx" for c in cases)
    assert cases[0].find("failure") is None and cases[0].find("skipped") is None
    failure = cases[1].find("failure")
    assert failure is not None and "0.08" in failure.get("message") and "<b>& more</b>" in failure.text
    assert cases[2].find("skipped").get("message") == "no original model"
    assert all(c.find("system-out") is not None for c in cases)
    props = {p.get("name"): p.get("value") for p in suite.find("properties")}
    assert props == {"samples": "10", "reference_from": "original", "original": "m.onnx"}


def test_check_status_and_json():
    import json

    from onnxcal.verify import Check, VerifyResult, skipped

    s = skipped("source", "why")
    assert s.passed and s.status == "skip" and s.value is None
    bad = Check("record", False, None, None, "no record")
    result = VerifyResult(checks=(s, bad), n=1, original="")
    assert not result.passed and result.failed == (bad,)
    d = json.loads(json.dumps(result.to_dict(), allow_nan=False))
    assert [c["status"] for c in d["checks"]] == ["skip", "fail"] and d["reference_from"] == "original"
