"""onnxcal: temperature-scale an exported ONNX classifier and patch its graph.

The operations are functions of the package itself, each returning a
frozen dataclass (see :mod:`onnxcal.api`)::

    import onnxcal
    result = onnxcal.calibrate("model.onnx", "val.npz", "calibrated.onnx", report="report/")

``capture``, ``fit``, ``patch``, ``verify``, ``report``, ``calibrate`` and
``inspect`` are the functions of ``onnxcal.api``. Four of them share their
name with a stage module (``onnxcal.capture``, ``onnxcal.fit``,
``onnxcal.verify``, ``onnxcal.report``): as attributes of the package the
names are the functions; the modules stay importable by their dotted name,
e.g. ``from onnxcal.fit import FitOptions``, or as objects with
``importlib.import_module("onnxcal.fit")`` (DEVELOPERS.md, "The Python API
and the module names").
"""

__version__ = "0.1.0"

# Importing api loads every stage module first; the names below then rebind
# the package attributes that the submodule imports had set.
from . import api  # noqa: E402
from .api import calibrate, capture, fit, inspect, patch, report, verify  # noqa: E402

__all__ = ["api", "calibrate", "capture", "fit", "inspect", "patch", "report", "verify", "__version__"]
