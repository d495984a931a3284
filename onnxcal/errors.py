"""The one exception type that reaches the user.

Every stage raises :class:`OnnxcalError` for input it cannot accept. The
message is a single sentence that names the problem (file, input or option)
and, where there is one, the fix. The CLI prints it on one line and exits
with status 2; library callers catch it like any other exception.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar

_CLI: ContextVar[bool] = ContextVar("onnxcal_cli_spelling", default=False)


@contextmanager
def cli_spelling() -> Iterator[None]:
    """Within it, messages name options as typed on the command line (``--force``), not as the
    Python API's keywords (``force=True``); the CLI runs every command in it."""
    token = _CLI.set(True)
    try:
        yield
    finally:
        _CLI.reset(token)


def spelled(cli: str, python: str) -> str:
    """How a message names an option: ``cli`` when the command line is running, else ``python``."""
    return cli if _CLI.get() else python


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
    """


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
