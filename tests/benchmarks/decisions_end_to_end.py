"""Decision outputs end to end: thresholds chosen by calibrate on the held-out rows, counted on a test split.

For the demo and for scikit-learn's digits (tests/digits_model.py), with LAS
and APS sets: ``calibrate --holdout 0.5 --accept-error 0.05 --set-coverage
0.9``, then the written model run with onnxruntime on the test split; the
error among accepted rows and the set coverage with scipy's exact 95 %
intervals (scipy.stats.binomtest), and verify's gates. Then the cost of the
decision options in calibrate: wall time with and without them, runs
alternating (a ratio; the machine is shared).

    .venv/bin/python tests/benchmarks/decisions_end_to_end.py
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from digits_model import make_digits  # noqa: E402

from onnxcal import api, graph  # noqa: E402
from onnxcal.decisions.plan import DecisionOptions  # noqa: E402
from onnxcal.fit import FitOptions  # noqa: E402

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures"
OPTIONS = FitOptions(holdout=0.5, bootstrap=0)


def _count(out: Path, test: Path) -> str:
    record = graph.read_record(onnx.load(str(out)))
    sess = ort.InferenceSession(str(out), providers=["CPUExecutionProvider"])
    arrays = np.load(test)
    got = dict(zip([o.name for o in sess.get_outputs()],
                   sess.run(None, {i.name: arrays[i.name] for i in sess.get_inputs()}), strict=True))
    y, p, taken = arrays["labels"], got[record.output], got["accept"]
    wrong = int((p.argmax(axis=1)[taken] != y[taken]).sum())
    e = stats.binomtest(wrong, int(taken.sum())).proportion_ci(method="exact")
    covered = int(got["class_set"][np.arange(len(y)), y].sum())
    c = stats.binomtest(covered, len(y)).proportion_ci(method="exact")
    gates = {ch.name: ch.status for ch in api.verify(out, test).checks}
    return (f"test n={len(y)}: accepted {taken.mean():.3f}, error among accepted {wrong}/{int(taken.sum())} = "
            f"{wrong / taken.sum():.4f} [{e.low:.4f}, {e.high:.4f}] (eps 0.05); set coverage {covered / len(y):.4f} "
            f"[{c.low:.4f}, {c.high:.4f}], mean size {got['class_set_size'].mean():.2f}; verify accept-error "
            f"{gates['accept-error']}, set-coverage {gates['set-coverage']}")


def main() -> None:
    work = Path(tempfile.mkdtemp())
    digits = make_digits(work)
    cases = {
        "demo": (FIXTURES / "conveyor_faults.onnx", FIXTURES / "conveyor_faults_val.npz",
                 FIXTURES / "conveyor_faults_test.npz"),
        "digits": (digits.model, digits.val, digits.test),
    }
    for name, (model, val, test) in cases.items():
        for score in ("las", "aps"):
            out = work / f"{name}_{score}.onnx"
            decide = DecisionOptions(accept_error=0.05, set_coverage=0.9, set_score=score)
            chosen = api.calibrate(model, val, out, options=OPTIONS, decisions=decide).decisions
            a = chosen.accept[0]
            print(f"{name} {score}: tau {a.threshold:.4f} accepts {a.accepted.successes}/{a.n} held-out rows; "
                  + _count(out, test))
    model, val, _ = cases["demo"]
    times: dict[bool, list[float]] = {False: [], True: []}
    for _ in range(3):
        for with_decisions in (False, True):
            decide = DecisionOptions(accept_error=0.05, set_coverage=0.9) if with_decisions else DecisionOptions()
            started = time.perf_counter()
            api.calibrate(model, val, work / "timed.onnx", options=OPTIONS, decisions=decide, force=True)
            times[with_decisions].append(time.perf_counter() - started)
    ratio = np.median(times[True]) / np.median(times[False])
    print(f"calibrate on the demo, median of 3 alternating runs: with decision options / without = {ratio:.2f}")


if __name__ == "__main__":
    main()
