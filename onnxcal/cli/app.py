"""The typer app and the entry point :func:`main`: the commands registered in
the order ``--help`` lists them, every ending of a run reported on one line
with its exit status.
"""

from __future__ import annotations

import os
import sys
import traceback
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Annotated, Any, TextIO

import typer

from .. import __version__, _paths, _runenv, _signals
from ..errors import OnnxcalError, OnnxcalWarning, cli_spelling
from . import commands, console
from .console import err, out, printable, warn
from .options import HelpCommand

app = typer.Typer(
    name="onnxcal",
    help=(
        "Calibrate an exported ONNX classifier: capture its logits on labelled data, "
        "fit a temperature T (or vector or Platt scaling) by minimising NLL, patch the "
        "graph to emit the calibrated probabilities, e.g. softmax(logits / T), and "
        "verify the patched file against NumPy.\n\n"
        "Exit status: 0 success, 1 a check failed, 2 bad input."
    ),
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


def _show_version(value: bool) -> None:
    if value:
        out.print(f"onnxcal {__version__}")
        raise typer.Exit(0)


@app.callback()
def _root(
    debug: Annotated[
        bool, typer.Option("--debug", help="Show the traceback behind an error (may go anywhere on the line).")
    ] = False,
    version: Annotated[
        bool,
        typer.Option("--version", help="Print the version and exit.", is_eager=True, callback=_show_version),
    ] = False,
) -> None:
    pass


def _summary(fn: Callable[..., Any]) -> str:
    """The first paragraph of a command's docstring, whole: ``onnxcal --help`` lists it
    (click's own short help stops at the first '. ', which cut "e.g." in two)."""
    return " ".join((fn.__doc__ or "").strip().split("\n\n")[0].split())


def _register(fn: Callable[..., Any], **kwargs: Any) -> None:
    app.command(cls=HelpCommand, short_help=_summary(fn), **kwargs)(fn)


# The commands, in the order --help lists them.
COMMANDS = ("inspect", "capture", "fit", "patch", "verify", "report", "calibrate")
_register(commands.inspect)
_register(commands.capture)
_register(commands.fit)
_register(commands.patch)
_register(commands.verify, epilog=commands.VERIFY_EPILOG)
_register(commands.report)
_register(commands.calibrate)


def _one_line(text: object) -> str:
    return " ".join(str(text).split())


def _show_warning(
    message: Warning | str, category: type[Warning], filename: str, lineno: int, file: TextIO | None = None,
    line: str | None = None,
) -> None:
    """Every warning as one 'warning:' line on stderr: onnxcal's as they are, a library's
    (numpy's RuntimeWarning, say) with its category, without Python's source line."""
    if issubclass(category, OnnxcalWarning):
        warn([_one_line(message)])
    else:
        warn([f"{category.__name__}: {_one_line(message)}"])


def _written(paths: Sequence[Path]) -> str:
    """What an interrupted run leaves: nothing, or the complete outputs it published before the signal."""
    if not paths:
        return "no output was written"
    shown = ", ".join(f"'{p}'" for p in paths[:3]) + (f" and {len(paths) - 3} more" if len(paths) > 3 else "")
    return f"the outputs were complete and written before it stopped ({shown})"


def main(argv: Sequence[str] | None = None) -> int:
    """Run the CLI; return the exit status (the console script exits with it).

    SIGINT and SIGTERM stop the run like an error (``_signals``): its
    temporaries are removed, one line is printed, and the status is 130 or
    143. Whatever ends the run, the line that reports it is printed with
    both signals ignored, so it is never cut short by a second one.
    """
    args = list(sys.argv[1:] if argv is None else argv)
    console.reset()  # this run's terminal and COLUMNS
    if [a for a in args if a != "--debug"][:1] == ["--version"]:  # at once: typer need not build the commands
        out.print(f"onnxcal {__version__}")
        return 0
    debug = "--debug" in args
    if debug:  # accept --debug anywhere on the line
        args = ["--debug"] + [a for a in args if a != "--debug"]
    with _signals.interrupting(), _paths.command() as run, cli_spelling():
        try:
            with warnings.catch_warnings(), _runenv.private_caches(), _runenv.one_line_logging(lambda m: warn([m])):
                warnings.simplefilter("always", OnnxcalWarning)
                warnings.showwarning = _show_warning
                rv = app(args=args, prog_name="onnxcal", standalone_mode=False)
            _signals.raise_if_received()  # a signal whose Interrupted a callback swallowed: the run was stopped
        except BaseException as exc:  # noqa: B036 - every ending is reported on one line
            _signals.stopping()
            return _report_failure(exc, debug, run.written, args)
    return rv if isinstance(rv, int) else 0


def _what_stopped(args: Sequence[str]) -> str:
    """' (calibrate stopped while capturing logits)': the command and its stage, when known."""
    command = next((a for a in args if a in COMMANDS), None)
    if command is None:
        return ""
    if not console.stage:
        return f" ({command} stopped)"
    now = console.stage[-1]  # "capturing logits", "fitting"; or a stage named by a noun, "vector: bootstrap"
    when = f"while {now}" if now.split()[0].endswith("ing") else f"during '{now}'"
    return f" ({command} stopped {when})"


def _report_failure(exc: BaseException, debug: bool, written: Sequence[Path], args: Sequence[str] = ()) -> int:
    """Print the one line that says how the run ended; return the exit status."""
    if isinstance(exc, SystemExit):  # typer.Exit and --version end the run normally
        return exc.code if isinstance(exc.code, int) else 0
    if debug and not isinstance(exc, typer.TyperException):
        traceback.print_exception(exc)
    if isinstance(exc, OnnxcalError):
        err.print(f"onnxcal: error: {_one_line(exc)}", soft_wrap=True)
        return exc.exit_code
    if isinstance(exc, typer.TyperException):  # bad usage: the parser's message, on one line too
        if type(exc).__name__ == "NoArgsIsHelpError":  # 'onnxcal' alone: the help
            exc.show()  # type: ignore[attr-defined]  # click's NoArgsIsHelpError is a UsageError, which shows
            return 2
        ctx = getattr(exc, "ctx", None)
        message = exc.format_message() if hasattr(exc, "format_message") else str(exc)
        message = _one_line(message).rstrip(".")
        if ctx is not None:  # "... Did you mean 'fit'? See ...", "Missing option '--out'; see ..."
            see = f"see '{ctx.command_path} --help'"
            message += f" S{see[1:]}" if message.endswith("?") else f"; {see}"
        err.print(f"onnxcal: error: {message}", soft_wrap=True)
        return 2
    if isinstance(exc, (_signals.Interrupted, KeyboardInterrupt, typer.Abort)):
        cause = exc.__cause__ if isinstance(exc, typer.Abort) and exc.__cause__ is not None else exc
        name = _signals.name_of(cause)
        err.print(f"onnxcal: interrupted by {name}; {_written(written)}{_what_stopped(args)}", soft_wrap=True)
        return _signals.exit_status(name)
    if isinstance(exc, OSError):  # a file error the api did not word (e.g. a file removed meanwhile)
        where = f" '{printable(os.fsdecode(exc.filename))}'" if exc.filename else ""
        err.print(
            f"onnxcal: error: cannot access{where}: {exc.strerror or exc}; check the path and its permissions",
            soft_wrap=True,
        )
        return 2
    if not isinstance(exc, Exception):
        raise exc
    err.print(  # an unexpected failure: still one line unless --debug
        f"onnxcal: internal error: {type(exc).__name__}: {_one_line(exc)} (rerun with --debug and report it)",
        soft_wrap=True,
    )
    return 2
