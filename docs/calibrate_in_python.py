# %% [markdown]
# # Calibrating an ONNX classifier from Python
#
# A notebook-style script (cells start with `# %%`; Jupyter, VS Code and
# similar editors run them one by one). It calibrates the bundled demo, an
# invented vibration-fault classifier for conveyor-belt motors, step by step
# with the Python API, then checks the result and writes a report.
#
# Run it from the root of the repository:
#
#     .venv/bin/python docs/calibrate_in_python.py
#
# Every function used here is also a command (`onnxcal capture`, `fit`,
# `patch`, `verify`, `report`, `calibrate`) and returns a frozen dataclass.

# %%
from pathlib import Path

import onnxcal
from onnxcal.data import DataSpec
from onnxcal.fit import FitOptions

MODEL = Path("fixtures/conveyor_faults.onnx")
VALIDATION = Path("fixtures/conveyor_faults_val.npz")  # labelled set the fit uses
TEST = Path("fixtures/conveyor_faults_test.npz")  # a split the fit never sees
CLASSES = Path("fixtures/conveyor_faults_classes.txt")
OUT = Path("calibration-demo")
OUT.mkdir(exist_ok=True)

# %% [markdown]
# ## 1. Capture the logits on the validation set

# %%
capture = onnxcal.capture(MODEL, VALIDATION, out=OUT / "scores.npz", force=True)
print(f"{capture.meta.n} samples x {capture.meta.num_classes} classes from output '{capture.meta.output}'")

# %% [markdown]
# ## 2. Fit a temperature, scored on a held-out quarter with bootstrap intervals

# %%
summary = onnxcal.fit(capture, out=OUT / "fit.json", force=True, options=FitOptions(holdout=0.25, bootstrap=200))
low, high = summary.intervals["parameters"]["temperature"]
print(f"T = {summary.temperature:.3f} (fit-part 95% interval {low:.3f} to {high:.3f})")
print(f"held-out ECE {summary.before.ece:.3f} -> {summary.after.ece:.3f}, "
      f"NLL {summary.before.nll:.3f} -> {summary.after.nll:.3f}, accuracy {summary.after.accuracy:.3f}")
for warning in summary.warnings:
    print("warning:", warning)

# %% [markdown]
# ## 3. Patch the graph so the model itself outputs the calibrated probabilities

# %%
patched = onnxcal.patch(MODEL, OUT / "calibrated.onnx", fit=summary, force=True)
print(f"calibrated output '{patched.record.output}' ({patched.record.rewrite}) in {patched.path}")

# %% [markdown]
# ## 4. Verify it on the test split: the NumPy reference, the record, and a bound on the ECE

# %%
check = onnxcal.verify(OUT / "calibrated.onnx", TEST, max_ece=0.05, junit=OUT / "verify.xml", force=True)
for c in check.checks:
    print(f"{c.name:12} {c.status:5} {c.value if c.value is not None else '-'}")
print("verify:", "all checks passed" if check.passed else "FAILED")

# %% [markdown]
# ## 5. Write the report a reviewer reads (HTML, Markdown, JSON, PNG plots)

# %%
report = onnxcal.report(OUT / "scores.npz", OUT / "report", model=OUT / "calibrated.onnx",
                        class_names=CLASSES, force=True)
print("\n".join(report.content["verdict"]))
print("open", report.directory + "/report.html")

# %% [markdown]
# The same in one call (capture, fit, patch, verify in memory, write only when
# every check passes, and the report beside it). A `DataSpec` says how to read
# the data; here it also names the classes, which the capture records:

# %%
data = DataSpec(path=VALIDATION, classes=CLASSES)
result = onnxcal.calibrate(MODEL, data, OUT / "calibrated_again.onnx", report=OUT / "report_again", force=True)
print("written:", result.patch.path if result.patch else None, "| checks passed:", result.verification.passed)

# %% [markdown]
# A notebook often holds the model and the data in memory already: an
# `onnx.ModelProto` goes wherever a model path does, and a mapping of arrays
# (input name -> array, with the labels under "labels", as `numpy.load` gives
# an .npz) or an `(inputs, labels)` pair wherever a validation set does, with
# the same checks and errors as files. `calibrate` checks the patched model on
# a sample of 256 rows (`verify_rows=None` checks every row, as `verify` does).

# %%
import numpy as np
import onnx

model = onnx.load(MODEL)
arrays = dict(np.load(VALIDATION))  # {"band_energies": (2000, 16) float32, "labels": (2000,) int64}
inputs, labels = {"band_energies": arrays["band_energies"]}, arrays["labels"]
result = onnxcal.calibrate(model, (inputs, labels), OUT / "calibrated_in_memory.onnx", force=True)
print(f"T = {result.summary.temperature:.4f};", result.verification.notes[0])

# %% [markdown]
# Calibration holds only for data like the validation set and drifts under
# distribution shift; re-check it after any change to the data or the model.
# It is no substitute for validation under your local regulations and for
# review by licensed professionals in safety-critical use.
