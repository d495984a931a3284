"""The one exception type that reaches the user.

Every stage raises :class:`OnnxcalError` for input it cannot accept. The
message is a single sentence that names the problem (file, input or option)
and, where there is one, the fix. The CLI prints it on one line and exits
with status 2; library callers catch it like any other exception.
"""

from __future__ import annotations

import functools
import re
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from typing import ParamSpec, TypeVar

_CLI: ContextVar[bool] = ContextVar("onnxcal_cli_spelling", default=False)

_P = ParamSpec("_P")
_R = TypeVar("_R")


@contextmanager
def cli_spelling() -> Iterator[None]:
    """Within it, messages name options as typed on the command line (``--force``), not as the
    Python API's keywords (``force=True``); the CLI runs every command in it."""
    token = _CLI.set(True)
    try:
        yield
    finally:
        _CLI.reset(token)


# Messages name options as the command line spells them (``--force``, ``--batch-axis``). From
# Python the same message names the keyword: ``--name`` becomes ``name`` with dashes as
# underscores (a keyword of the api function, or a field of DataSpec, Selection, FitOptions,
# DecisionOptions, or a key of DataSpec.image), a flag becomes ``name=True``, and these differ:
KEYWORDS = {
    "force": "force=True",
    "drop-nonfinite": "drop_nonfinite=True",
    "drop-logits": "drop_logits=True",
    "fold": "fold=True",
    "fitted-on-twin": "fitted_on_twin=True",
    "latency": "latency=True",
    "set-per-class": "set_per_class=True",
    "verify-all": "verify_rows=None",
    "no-scale": "scale=False",
    "bins": "n_bins",
    "input": "inputs",
    "constant": "constants",
    "batch-axis": "batch_axes",
    "format": "formats",
}
"""Options whose keyword is not the option's name with underscores."""

CLI_ONLY = frozenset({"help", "debug", "version", "quiet", "json"})
"""Options of the command line alone, left as they are."""

# an option starts a word (after a space, a bracket, a comma or nothing): "--x" inside a path stays
_OPTION = re.compile(r"(?<![^\s(\[,])--([a-z][a-z0-9]*(?:-[a-z0-9]+)*)\b(?!-)")
_COMMAND_LINE = re.compile(r"'onnxcal ([a-z]+)((?: [^']*)?)'")  # a command line quoted in a message


def keyword(option: str) -> str:
    """How the Python API names ``--option`` (without its dashes).

    >>> keyword("batch-axis"), keyword("force"), keyword("max-model-bytes")
    ('batch_axes', 'force=True', 'max_model_bytes')
    """
    return KEYWORDS.get(option, option.replace("-", "_"))


def python_spelling(text: str) -> str:
    """``text`` with every command-line option named as the Python API's keyword.

    >>> python_spelling("--out 'a.npz' already exists; pass --force to replace it")
    "out 'a.npz' already exists; pass force=True to replace it"
    >>> python_spelling("give a file written by 'onnxcal fit --out'")
    'give a file written by onnxcal.fit(out=...)'
    >>> python_spelling("cannot read '/data/--runs/x.npz' (--data)")
    "cannot read '/data/--runs/x.npz' (data)"
    """

    def command(m: re.Match[str]) -> str:
        words = m.group(2).split()
        args = [f"{keyword(w[2:])}=" + (words[i + 1] if i + 1 < len(words) and not words[i + 1].startswith("--")
                                         else "...")
                for i, w in enumerate(words) if w.startswith("--")]
        return f"onnxcal.{m.group(1)}({', '.join(args)})"

    def option(m: re.Match[str]) -> str:
        return m.group(0) if m.group(1) in CLI_ONLY else keyword(m.group(1))

    return _OPTION.sub(option, _COMMAND_LINE.sub(command, text))


def keyword_errors(fn: Callable[_P, _R]) -> Callable[_P, _R]:
    """Decorate a public api function: an :class:`OnnxcalError` leaving it names the keywords
    (``force=True``) instead of the command line's options, unless the command line is running
    (:func:`cli_spelling`), whose messages keep ``--force``."""

    @functools.wraps(fn)
    def api_function(*args: _P.args, **kwargs: _P.kwargs) -> _R:
        try:
            return fn(*args, **kwargs)
        except OnnxcalError as exc:
            if not _CLI.get():
                exc.message = python_spelling(exc.message)
                exc.hint = None if exc.hint is None else python_spelling(exc.hint)
                exc.args = (str(exc),)
            raise

    return api_function


class OnnxcalError(Exception):
    """A problem with the user's input, reported without a traceback.

    Parameters
    ----------
    message : str
        What is wrong, naming the file, input or option concerned.
    hint : str, optional
        What to do about it; appended to the message after a semicolon.
    """

    exit_code = 2

    def __init__(self, message: str, hint: str | None = None) -> None:
        self.message = message
        self.hint = hint
        super().__init__(self.__str__())

    def __str__(self) -> str:
        if self.hint:
            return f"{self.message}; {self.hint}"
        return self.message


class OnnxcalWarning(UserWarning):
    """Something the user should know that does not stop the work.

    Raised through :func:`warnings.warn` (e.g. a fixed-batch model that must
    run one sample at a time); the CLI prints it as one ``warning:`` line.
    Like an error leaving the Python API (:func:`keyword_errors`), its
    message names the keywords (``drop_nonfinite=True``) unless the command
    line is running (:func:`cli_spelling`), whose lines keep the options
    (``--drop-nonfinite``). The spelling is chosen when the warning is made,
    in the context it is made in: a worker thread that may warn runs in a
    copy of its caller's context (``contextvars.copy_context``).
    """

    def __init__(self, *args: object) -> None:
        if args and isinstance(args[0], str) and not _CLI.get():
            args = (python_spelling(args[0]), *args[1:])
        super().__init__(*args)


def first_line(exc: BaseException, limit: int = 300) -> str:
    """The first line of a library's error message (its type name when empty), at most ``limit`` characters.

    Messages from onnx, onnxruntime, numpy and Pillow are quoted this way
    inside an :class:`OnnxcalError` sentence when they name something the
    user can act on (a node, a tensor); the full original stays chained
    (``raise ... from exc``) and ``onnxcal --debug`` prints it.
    """
    text = str(exc).strip()
    line = text.splitlines()[0] if text else type(exc).__name__
    return line if len(line) <= limit else line[: limit - 3] + "..."
