"""Choosing the thresholds a patch bakes in (decisions.plan) and verify's checks of them (decisions.gate)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from onnxcal.decisions import gate, plan
from onnxcal.decisions.plan import DecisionOptions, Rows
from onnxcal.errors import OnnxcalError

WHERE = Rows("holdout", 0, "test rows")


def _population(rng: np.random.Generator, n: int, k: int = 4) -> tuple[np.ndarray, np.ndarray]:
    """Probabilities that are the true conditional distribution (labels drawn from them): calibrated."""
    logits = rng.normal(scale=2.5, size=(n, k))
    p = np.exp(logits - logits.max(axis=1, keepdims=True))
    p = (p / p.sum(axis=1, keepdims=True)).astype(np.float32)
    p64 = p.astype(np.float64)
    y = (rng.random(n)[:, None] > np.cumsum(p64 / p64.sum(axis=1, keepdims=True), axis=1)).sum(axis=1)
    return p, np.minimum(y, k - 1)


def test_options_checked_at_the_boundary() -> None:
    with pytest.raises(OnnxcalError, match="--accept-error"):
        plan.check_decision_options(DecisionOptions(accept_error=1.5))
    with pytest.raises(OnnxcalError, match="--set-coverage"):
        plan.check_decision_options(DecisionOptions(set_coverage=0.0))
    with pytest.raises(OnnxcalError, match="--set-score"):
        plan.check_decision_options(DecisionOptions(set_coverage=0.9, set_score="raps"))
    with pytest.raises(OnnxcalError, match="apply to --set-coverage"):
        plan.check_decision_options(DecisionOptions(set_per_class=True))
    assert not DecisionOptions().wanted and DecisionOptions(accept_error=0.1).wanted


def test_choose_and_the_record_section_round_trip() -> None:
    rng = np.random.default_rng(16)
    p, y = _population(rng, 4000)
    options = DecisionOptions(accept_error=0.05, set_coverage=0.9, set_score="aps")
    held, other = np.arange(2000, 4000), np.arange(2000)
    chosen = plan.choose(p, y, held, options, WHERE, other_rows=other)
    assert chosen.accept[0].found and "other rows" in chosen.grid
    section = chosen.section()
    # the gate reads back exactly what the graph was given
    assert gate.accept_threshold(section)[0] == chosen.accept_threshold
    assert gate.set_threshold(section) == chosen.sets
    assert any("accept: confidence >=" in line for line in chosen.lines())
    unmet = plan.choose(p, y, held[:20], DecisionOptions(accept_error=0.01), WHERE)
    assert unmet.unmet == (0,) and unmet.accept_threshold == np.inf
    assert any("NO threshold" in line for line in unmet.lines())


def test_outputs_and_reference_checks_catch_a_changed_decision() -> None:
    rng = np.random.default_rng(17)
    p, y = _population(rng, 1000)
    chosen = plan.choose(p, y, np.arange(500), DecisionOptions(accept_error=0.1, set_coverage=0.9), WHERE)
    section = chosen.section()
    got = gate.expected(p, section)
    assert gate.outputs_check(got, p, section).passed
    ref = p.astype(np.float64) + rng.normal(scale=1e-7, size=p.shape)  # a reference that rounds differently
    assert gate.reference_check(got, ref, section, 1e-5).passed
    far = np.flatnonzero(np.abs(p.max(axis=1) - chosen.accept_threshold) > 1e-3)[0]
    broken = {**got, "accept": got["accept"].copy()}
    broken["accept"][far] = ~broken["accept"][far]
    assert not gate.outputs_check(broken, p, section).passed
    assert not gate.reference_check(broken, ref, section, 1e-5).passed
    held = {"accept": np.float32([chosen.accept_threshold]), "class_set": chosen.sets.vector(4)}
    assert gate.record_check(section, held).passed
    assert not gate.record_check(section, {**held, "accept": np.float32([0.5])}).passed


@pytest.mark.parametrize(("error", "outcome"), [(0.2, "pass"), (0.02, "fail"), (0.08, "undecided")])
def test_error_gate_pass_fail_undecided(error: float, outcome: str) -> None:
    # 1000 accepted rows, 70 wrong: exact 95 % interval about [0.055, 0.088] (scipy's binomtest, Clopper-Pearson)
    p = np.tile(np.float32([[0.9, 0.1]]), (1200, 1))
    y = np.r_[np.zeros(930, int), np.ones(70, int), np.zeros(200, int)]
    accept = np.r_[np.ones(1000, bool), np.zeros(200, bool)]
    ci = stats.binomtest(70, 1000).proportion_ci(0.95, method="exact")
    assert ci.low < 0.08 < ci.high and ci.high < 0.2 and ci.low > 0.02
    check = gate.error_gate({"accept": accept}, p, y, "multiclass", error, 0.95)
    assert check.status == outcome and check.passed == (outcome != "fail")


@pytest.mark.parametrize(("coverage", "outcome"), [(0.8, "pass"), (0.99, "fail"), (0.9, "undecided")])
def test_coverage_gate_pass_fail_undecided(coverage: float, outcome: str) -> None:
    rng = np.random.default_rng(18)
    y = rng.integers(0, 3, size=1000)
    member = np.zeros((1000, 3), bool)
    member[np.arange(1000), y] = np.arange(1000) < 900  # 900 of 1000 covered
    member[np.arange(1000) >= 900, (y[np.arange(1000) >= 900] + 1) % 3] = True
    sets = plan.SetThreshold("las", coverage, False, (0.2,), (5000,), (4501,), "float32")
    check = gate.coverage_gate({"class_set": member}, y, sets, coverage, 0.95)
    assert check.status == outcome, check.detail


def test_an_undecided_gate_passes_and_says_so_in_junit() -> None:
    import xml.etree.ElementTree as ET

    from onnxcal.junit import junit_xml
    from onnxcal.verify import Check, VerifyResult

    undecided = Check("set-coverage", True, 0.89, 0.884, "interval straddles", undecided=True)
    result = VerifyResult(checks=(undecided, Check("accept-error", False, 0.2, 0.05, "above")), n=10, original="m")
    assert undecided.status == "undecided" and undecided.to_dict()["status"] == "undecided"
    assert [c.name for c in result.failed] == ["accept-error"]
    cases = {c.get("name"): c for c in ET.fromstring(junit_xml(result, suite="s")).iter("testcase")}
    out = cases["set-coverage"].find("system-out")
    assert cases["set-coverage"].find("failure") is None and out is not None and "undecided" in (out.text or "")
    assert cases["accept-error"].find("failure") is not None
