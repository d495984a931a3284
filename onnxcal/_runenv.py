"""What a command-line run of onnxcal does to its surroundings: nothing but its outputs.

Two libraries write files of their own unless told otherwise:

* onnxruntime writes a device id and a small database under
  ``~/.cache/Microsoft/DeveloperTools/.onnxruntime`` (its telemetry, on by
  default in the wheels); ``ORT_DISABLE_TELEMETRY=1`` before its first
  import stops it (``capture.onnxruntime`` sets it).
* matplotlib creates ``~/.config/matplotlib`` and writes its font cache to
  ``~/.cache/matplotlib``; when those cannot be written (a read-only home)
  it makes a temporary folder and logs several lines about it.

:func:`private_caches` points matplotlib at a temporary folder of the run
(``MPLCONFIGDIR``), created in the system's temporary directory and removed
when the run ends, however it ends. :func:`one_line_logging` turns what a
library logs at WARNING and above into one ``warning:`` line each.
"""

from __future__ import annotations

import contextlib
import logging
import os
import shutil
import tempfile
from collections.abc import Callable, Iterator

from . import _signals


@contextlib.contextmanager
def private_caches() -> Iterator[str | None]:
    """Within the block, matplotlib's configuration and cache live in a temporary folder of this run.

    Yields the folder (None when the user set ``MPLCONFIGDIR`` themselves, or
    when no temporary folder can be made anywhere). onnxruntime's telemetry
    is switched off for the process (``ORT_DISABLE_TELEMETRY``, unless set).
    """
    os.environ.setdefault("ORT_DISABLE_TELEMETRY", "1")
    if "MPLCONFIGDIR" in os.environ:
        yield None
        return
    try:
        folder = tempfile.mkdtemp(prefix="onnxcal-run-")
    except OSError:  # TMPDIR, /tmp, /var/tmp and the working directory all read-only
        folder = None
    if folder is not None:
        os.environ["MPLCONFIGDIR"] = folder
    try:
        yield folder
    finally:
        if folder is not None:
            with _signals.deferred():
                os.environ.pop("MPLCONFIGDIR", None)
                shutil.rmtree(folder, ignore_errors=True)


class _OneLine(logging.Handler):
    def __init__(self, emit: Callable[[str], None]) -> None:
        super().__init__(logging.WARNING)
        self._emit = emit

    def emit(self, record: logging.LogRecord) -> None:
        with contextlib.suppress(Exception):
            self._emit(f"{record.name}: {' '.join(record.getMessage().split())}")


@contextlib.contextmanager
def one_line_logging(emit: Callable[[str], None]) -> Iterator[None]:
    """Within the block, log records of WARNING and above reach ``emit`` as one line each.

    Python's last-resort handler would print a record's text as it is,
    over several lines; libraries' loggers that have handlers of their own
    are left alone.
    """
    root = logging.getLogger()
    handler = _OneLine(emit)
    root.addHandler(handler)
    try:
        yield
    finally:
        root.removeHandler(handler)
