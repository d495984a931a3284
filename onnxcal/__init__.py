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

``import onnxcal`` itself imports nothing heavy: ``api`` (and with it onnx,
numpy and the stages) is imported the first time one of these names is
read, so that ``onnxcal --help`` and the command line's start stay fast.
"""

from __future__ import annotations

import importlib
import sys
import types
from typing import Any

__version__ = "0.1.0"

_API_NAMES = ("calibrate", "capture", "fit", "inspect", "patch", "report", "verify")

__all__ = ["api", "calibrate", "capture", "fit", "inspect", "patch", "report", "verify", "__version__"]


def _api_function(name: str) -> property:
    """The package attribute ``name``: always ``onnxcal.api.<name>``, imported on first use.

    A property of the package's module class is a data descriptor, so it
    wins over the module's ``__dict__``: when the import system binds the
    submodule ``onnxcal.fit`` to the package (``setattr(onnxcal, "fit",
    module)``, whichever module imported it first), the setter keeps it
    aside and ``onnxcal.fit`` stays the function.
    """

    def get(package: types.ModuleType) -> Any:
        return getattr(importlib.import_module(f"{__name__}.api"), name)

    def set_(package: types.ModuleType, value: Any) -> None:
        package.__dict__[f"_{name}_module"] = value  # the submodule; sys.modules has it too

    return property(get, set_, doc=f"onnxcal.api.{name}")


class _Package(types.ModuleType):
    """The module class of ``onnxcal``: the API names resolve lazily (see :func:`_api_function`)."""

    calibrate = _api_function("calibrate")
    capture = _api_function("capture")
    fit = _api_function("fit")
    inspect = _api_function("inspect")
    patch = _api_function("patch")
    report = _api_function("report")
    verify = _api_function("verify")


def __getattr__(name: str) -> Any:
    if name == "api":
        return importlib.import_module(f"{__name__}.api")
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


sys.modules[__name__].__class__ = _Package
