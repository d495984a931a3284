"""inspect, capture and fit through the Python API: image class order, shard files, non-finite rows."""


import numpy as np
import pytest
from conftest import (
    BELT_CLASSES,
    BELT_IMAGES,
    BELT_MODEL,
    BELT_PREPROCESS,
    DEMO_MODEL,
    DEMO_VAL,
)

from onnxcal import api
from onnxcal.data import DataSpec, Selection
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions


def test_inspect_demo():
    info = api.inspect(DEMO_MODEL)
    assert info.site.output == "logits" and info.site.activation is None
    assert info.site.num_classes == 5 and not info.batch_fixed and info.opset == 17


QUICK = FitOptions(holdout=0, bootstrap=0)  # in-sample, no intervals: these tests are about the data


def test_image_class_order_matters(tmp_path):
    # Without the class list the sorted folder names misname two of the three classes.
    good = api.capture(BELT_MODEL, DataSpec(path=BELT_IMAGES, classes=BELT_CLASSES, preprocess=BELT_PREPROCESS))
    wrong = api.capture(BELT_MODEL, DataSpec(path=BELT_IMAGES, preprocess=BELT_PREPROCESS))
    acc = lambda c: float(np.mean(np.asarray(c.logits).argmax(1) == c.labels))  # noqa: E731
    assert acc(good) >= 0.8 > acc(wrong)


def test_fit_accepts_shard_files(tmp_path):
    files = [tmp_path / f"s{i}.npz" for i in (1, 2, 3)]
    for i, f in enumerate(files, start=1):
        api.capture(DEMO_MODEL, DataSpec(path=DEMO_VAL, selection=Selection(shard=(i, 3))), out=f)
    whole = api.fit(api.capture(DEMO_MODEL, DEMO_VAL), options=QUICK)
    merged = api.fit(files, out=tmp_path / "fit.json", options=QUICK)
    assert merged.temperature == whole.temperature
    assert list(merged.capture["merged_from"]) == [str(f) for f in files]


def test_dropping_nonfinite_rows_fits_as_the_finite_rows_alone(tmp_path):
    # The demo with NaN in 30 rows' inputs (the model then gives NaN logits there): with
    # --drop-nonfinite, fit and calibrate give the fit of the capture of the other rows.
    val = np.load(DEMO_VAL)
    x, y = val["band_energies"].copy(), val["labels"]
    bad = np.arange(7, 2000, 67)
    x[bad, 3] = np.nan
    np.savez(tmp_path / "nan.npz", band_energies=x, labels=y)
    keep = np.setdiff1d(np.arange(len(y)), bad)
    np.savez(tmp_path / "clean.npz", band_energies=x[keep], labels=y[keep])
    options = FitOptions(bootstrap=0)
    with pytest.warns(Warning):  # the inputs and the logits of those rows are reported
        api.capture(DEMO_MODEL, tmp_path / "nan.npz", out=tmp_path / "nan_cap.npz")
    with pytest.raises(OnnxcalError, match=r"NaN or Inf in 30 of 2000 rows \(first rows: 7, 74, 141, 208, 275\)"):
        api.fit(tmp_path / "nan_cap.npz", options=options)
    dropped = api.fit(tmp_path / "nan_cap.npz", options=options, drop_nonfinite=True)
    clean = api.fit(api.capture(DEMO_MODEL, tmp_path / "clean.npz"), options=options)
    assert dropped.temperature == pytest.approx(clean.temperature, rel=1e-12)
    assert dropped.after == clean.after
    assert any(n.startswith("dropped 30 rows: ") for n in dropped.notes)
    with pytest.warns(Warning, match="input 'band_energies'"):
        result = api.calibrate(DEMO_MODEL, tmp_path / "nan.npz", tmp_path / "c.onnx", options=options,
                               drop_nonfinite=True)
    assert result.patch is not None and result.verification.passed
    assert result.summary.temperature == pytest.approx(clean.temperature, rel=1e-12)


def test_fit_and_calibrate_report_progress_of_every_stage(tmp_path):
    calls: list[tuple[str, int, int]] = []

    def progress(stage: str, done: int, total: int) -> None:
        calls.append((stage, done, total))

    api.fit(api.capture(DEMO_MODEL, DEMO_VAL), options=FitOptions(bootstrap=12), progress=progress)
    assert [c for c in calls if c[0] == "bootstrap"] == [("bootstrap", i, 12) for i in range(13)]
    assert calls[0] == ("fitting", 0, 3) and ("fitting", 3, 3) in calls
    calls.clear()
    api.calibrate(DEMO_MODEL, DEMO_VAL, tmp_path / "c.onnx", options=FitOptions(bootstrap=7), progress=progress)
    stages = [s for i, (s, _, _) in enumerate(calls) if i == 0 or calls[i - 1][0] != s]
    assert stages[:3] == ["capturing logits", "fitting", "bootstrap"], stages
    assert "running patched model" in stages[3:]
    assert [d for s, d, _ in calls if s == "bootstrap"] == list(range(8))
