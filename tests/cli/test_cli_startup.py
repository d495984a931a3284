"""Start-up: the command line imports no heavy library until a command runs.

``onnxcal --help`` and ``--version`` must stay within a fraction of a second
of a bare interpreter (issue 14); the time itself is measured by
tests/benchmarks/bench_startup.py, not here (timings on a shared machine are
noise). What can regress silently is an import: these tests check, in a
fresh interpreter, which modules importing the package and the CLI loads.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

HEAVY = ("onnx", "onnxruntime", "scipy", "matplotlib", "numpy", "PIL", "ml_dtypes", "threadpoolctl", "numba")


def _loaded_after(code: str) -> set[str]:
    probe = f"{code}\nimport json, sys\nprint(json.dumps(sorted({{m.split('.')[0] for m in sys.modules}})))"
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    return set(json.loads(done.stdout.splitlines()[-1]))


@pytest.mark.parametrize("code", ["import onnxcal", "import onnxcal.cli", "import _onnxcal_launch, onnxcal.cli"])
def test_importing_the_cli_loads_no_heavy_library(code: str) -> None:
    assert not _loaded_after(code) & set(HEAVY)


def test_help_and_version_load_no_heavy_library() -> None:
    for argv in (["--help"], ["--version"], ["calibrate", "--help"], ["verify", "--help"]):
        code = (
            "import contextlib, io\nfrom onnxcal.cli import main\n"
            f"with contextlib.redirect_stdout(io.StringIO()):\n    assert main({argv!r}) == 0"
        )
        assert not _loaded_after(code) & set(HEAVY), argv


def test_inspect_loads_no_scipy_onnxruntime_or_matplotlib() -> None:
    from conftest import DEMO_MODEL

    code = (
        "import contextlib, io\nfrom onnxcal.cli import main\n"
        f"with contextlib.redirect_stdout(io.StringIO()):\n    assert main(['inspect', {str(DEMO_MODEL)!r}]) == 0"
    )
    loaded = _loaded_after(code)
    assert "onnx" in loaded  # it did read the model
    assert not loaded & {"scipy", "onnxruntime", "matplotlib", "PIL"}


def _modules_after(code: str) -> set[str]:
    probe = f"{code}\nimport json, sys\nprint(json.dumps(sorted(sys.modules)))"
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    return set(json.loads(done.stdout.splitlines()[-1]))


def test_patch_imports_no_stage_it_does_not_run(tmp_path) -> None:
    # patch --temperature reads, rewrites and writes a graph: it runs no model, fits nothing, draws
    # nothing; onnx (which it reads the model with) is its one heavy import (docs/benchmarks.md)
    from conftest import DEMO_MODEL

    out = tmp_path / "patched.onnx"
    code = (
        "import contextlib, io\nfrom onnxcal.cli import main\n"
        f"with contextlib.redirect_stdout(io.StringIO()):\n"
        f"    assert main(['patch', {str(DEMO_MODEL)!r}, '--temperature', '1.5', '--out', {str(out)!r}]) == 0"
    )
    loaded = _modules_after(code)
    assert out.is_file() and "onnx" in loaded
    assert not {m.split(".")[0] for m in loaded} & {"scipy", "onnxruntime", "matplotlib", "PIL", "threadpoolctl"}
    stages = ("capture", "fit", "maps", "metrics", "report", "verify", "reading", "sweep", "resample")
    assert not {m for m in loaded if m.split(".")[:2] in [["onnxcal", s] for s in stages]}
    assert "onnxcal.api.calibrating" not in loaded and "onnxcal.api.deciding" not in loaded


def test_the_api_names_are_the_functions_whatever_was_imported_first() -> None:
    # The package attributes resolve lazily; a stage module imported before them must not
    # take their place (onnxcal.fit stays the function, the module stays importable).
    code = (
        "import importlib, onnxcal\nfrom onnxcal.fit import FitOptions\nfrom onnxcal.capture import Capture\n"
        "import onnxcal.api as api\n"
        "assert onnxcal.fit is api.fit and onnxcal.capture is api.capture and onnxcal.verify is api.verify\n"
        "assert onnxcal.report is api.report and callable(onnxcal.inspect)\n"
        "assert importlib.import_module('onnxcal.fit').FitOptions is FitOptions\n"
    )
    _loaded_after(code)  # raises CalledProcessError if an assertion fails


def test_cli_defaults_are_the_librarys() -> None:
    # onnxcal/cli/defaults.py writes the library's constants out so that --help imports nothing.
    from onnxcal.api import DEFAULT_LATENCY_RUNS, VERIFY_ROWS
    from onnxcal.capture import CPU, DEFAULT_BATCH, OPTIMIZATION_LEVELS
    from onnxcal.cli import defaults
    from onnxcal.data import IMAGE_OPTIONS
    from onnxcal.data.preprocess import _INTERPOLATION
    from onnxcal.graph import DEFAULT_OUTPUT_NAME
    from onnxcal.graph.site import HOLDS
    from onnxcal.graph.tensors import ACTIVATION_CHOICES, COMPUTE_DTYPES
    from onnxcal.metrics import DEFAULT_BINS
    from onnxcal.report import FORMATS
    from onnxcal.scaling import METHODS, MULTILABEL_MODES

    assert (defaults.CPU, defaults.DEFAULT_BATCH) == (CPU, DEFAULT_BATCH)
    assert defaults.OPTIMIZATION_LEVELS == tuple(OPTIMIZATION_LEVELS)
    assert defaults.IMAGE_OPTIONS == tuple(IMAGE_OPTIONS) and defaults.INTERPOLATIONS == tuple(_INTERPOLATION)
    assert defaults.DEFAULT_OUTPUT_NAME == DEFAULT_OUTPUT_NAME and defaults.DEFAULT_BINS == DEFAULT_BINS
    assert defaults.FORMATS == tuple(FORMATS) and defaults.DEFAULT_LATENCY_RUNS == DEFAULT_LATENCY_RUNS
    assert defaults.VERIFY_ROWS == VERIFY_ROWS
    assert defaults.METHODS == tuple(METHODS) and defaults.MULTILABEL_MODES == tuple(MULTILABEL_MODES)
    assert defaults.HOLDS == tuple(HOLDS) and defaults.COMPUTE_DTYPES == tuple(COMPUTE_DTYPES)
    assert defaults.ACTIVATIONS == tuple(ACTIVATION_CHOICES)


def test_version_from_the_console_script() -> None:
    from onnxcal import __version__

    done = subprocess.run(
        [sys.executable, "-c", "import sys, _onnxcal_launch as m; sys.argv[1:] = ['--version']; sys.exit(m.main())"],
        capture_output=True, text=True, check=True,
    )
    assert done.stdout == f"onnxcal {__version__}\n"
