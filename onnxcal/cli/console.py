"""What the command line writes to the terminal: two rich consoles whose text
passes through :func:`printable`, warnings as one line, JSON, progress bars.
"""

from __future__ import annotations

import contextlib
import json
import struct
import sys
import time
from collections.abc import Iterator, Sequence
from typing import Any

from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    ProgressColumn,
    Task,
    TaskID,
    TextColumn,
    TimeRemainingColumn,
)
from rich.text import Text

from ..capture import ProgressFn


def printable(text: str) -> str:
    r"""``text`` with every character a terminal would act on shown escaped.

    Names and messages can come from a hostile file (a tensor named with an
    ANSI escape sequence, a label holding a control character, a code point
    numpy allows and Unicode does not); escaped, they cannot drive the
    terminal, and they still show what the file holds.

    >>> print(printable("logits\x1b[2J, été"))
    logits\x1b[2J, été
    """
    if all(line.isprintable() for line in text.split("\n")):
        return text
    raw = text.encode("utf-32-le", "surrogatepass")  # code points, without making a str of each
    kept = []
    for o in struct.unpack(f"<{len(raw) // 4}I", raw):
        c = chr(o) if o <= 0x10FFFF else ""
        kept.append(c if c and (c == "\n" or c.isprintable()) else _escaped(o))
    return "".join(kept)


def _escaped(o: int) -> str:
    if 0xDC80 <= o <= 0xDCFF:  # a byte of a file name that is not UTF-8 (Python's surrogateescape)
        return f"\\x{o - 0xDC00:02x}"
    return f"\\x{o:02x}" if o < 0x100 else f"\\u{o:04x}" if o < 0x10000 else f"\\U{o:08x}"


class _Console(Console):
    """A rich Console whose strings (printed, or in tables) pass through :func:`printable`."""

    def render_str(self, text: str, **kwargs: Any) -> Text:
        return super().render_str(printable(text), **kwargs)


out = _Console(highlight=False, markup=False)
err = _Console(stderr=True, highlight=False, markup=False)


class _RateColumn(ProgressColumn):
    """Samples per second."""

    def render(self, task: Task) -> Text:
        speed = task.finished_speed or task.speed
        return Text(f"{speed:,.0f} samples/s" if speed else "- samples/s")


@contextlib.contextmanager
def progress_bar(quiet: bool) -> Iterator[ProgressFn | None]:
    """A rich progress bar on stderr, fed by the stages' progress callback."""
    if quiet:
        yield None
        return
    bar = Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        _RateColumn(),
        TimeRemainingColumn(),
        console=err,
        transient=False,
    )
    tasks: dict[str, TaskID] = {}

    shown: dict[str, float] = {}

    def update(description: str, done: int, total: int) -> None:
        if not tasks:  # start drawing at the first batch, not before
            bar.start()
        if description not in tasks:
            tasks[description] = bar.add_task(description, total=total)
        now = time.monotonic()
        if done >= total or now - shown.get(description, 0.0) >= 0.05:  # cheap on tiny batches
            shown[description] = now
            bar.update(tasks[description], completed=done)

    try:
        yield update
    except BaseException:
        bar.live.transient = True  # a failure: its one line, without the bars above it
        raise
    finally:
        if tasks:
            bar.stop()


def warn(messages: Sequence[str]) -> None:
    for m in messages:
        err.print(f"warning: {m}", soft_wrap=True)


def print_json(data: Any) -> None:
    sys.stdout.write(json.dumps(data, indent=2, sort_keys=True, default=str) + "\n")
