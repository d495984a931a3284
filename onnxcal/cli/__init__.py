"""Command line: parse, call ``onnxcal.api``, print. Nothing else imports this package.

Exit status: 0 success, 1 a verification check failed, 2 bad input (one line
on stderr; ``onnxcal --debug CMD ...`` shows the traceback), 130 interrupted
by SIGINT (Ctrl-C), 143 by SIGTERM; the run's temporaries are removed first.

The modules: ``app`` (the typer app, :func:`main` and the one line that
reports how a run ended), ``commands`` (one function per command),
``options`` (the option declarations the commands share), ``render`` (the
tables and lines they print) and ``console`` (the terminal: escaped text,
warnings, JSON, progress bars).
"""

from .app import app, main
from .commands import calibrate, capture, fit, inspect, patch, report, verify
from .console import err, out, printable
from .render import CAUTION

__all__ = [
    "CAUTION",
    "app",
    "calibrate",
    "capture",
    "err",
    "fit",
    "inspect",
    "main",
    "out",
    "patch",
    "printable",
    "report",
    "verify",
]
