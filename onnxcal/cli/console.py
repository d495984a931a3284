"""What the command line writes to the terminal: two rich consoles (made on
first use) whose text passes through :func:`printable`; prose lines wrapped at
word boundaries on a terminal (:func:`say`), tables that never cut a figure
(:func:`show_table`), warnings, JSON, progress bars.
"""

from __future__ import annotations

import contextlib
import json
import struct
import sys
import textwrap
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
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


def _make_console(stderr: bool) -> Any:
    from rich.console import (
        Console,  # rich is imported when something is printed, not with the CLI
    )

    class _Console(Console):
        """A rich Console whose strings (printed, or in tables) pass through :func:`printable`."""

        def render_str(self, text: str, **kwargs: Any) -> Any:
            return super().render_str(printable(text), **kwargs)

    return _Console(stderr=stderr, highlight=False, markup=False)


class _Stream:
    """stdout or stderr as a rich Console, made on first use (and again after :func:`reset`)."""

    def __init__(self, stderr: bool) -> None:
        self._stderr = stderr
        self._console: Any = None

    @property
    def console(self) -> Any:
        if self._console is None:
            self._console = _make_console(self._stderr)
        return self._console

    def __getattr__(self, name: str) -> Any:
        return getattr(self.console, name)


out = _Stream(stderr=False)
err = _Stream(stderr=True)
stage: list[str] = []
"""What the run is doing now (the description of the last progress task), for the line an interruption prints."""


def reset() -> None:
    """Make the consoles anew at the next print: a run reads the terminal (and COLUMNS) it has now."""
    out._console = err._console = None
    stage.clear()


def say(text: str, stream: _Stream | None = None, indent: int = 2) -> None:
    """Print one line of prose (``note: ...``, ``caution: ...``).

    On a terminal it is wrapped at word boundaries to the terminal's width,
    the following lines indented, and never broken inside a word (a path or
    a figure stays whole, even if it is wider than the terminal); elsewhere
    (a pipe, a file, a CI log) it is one line, however long.
    """
    console = (stream or out).console
    text = printable(text)
    if console.is_terminal and len(text) > console.width:
        text = textwrap.fill(
            text, console.width, subsequent_indent=" " * indent, break_long_words=False, break_on_hyphens=False
        )
    console.print(text, soft_wrap=True, markup=False, highlight=False)


@dataclass(frozen=True)
class Column:
    """A column of a :class:`Grid`: its header, numbers to the right, prose that may wrap."""

    header: str
    right: bool = False
    prose: bool = False


@dataclass
class Grid:
    """A table to print with :func:`show_table`: a title, columns and rows of strings."""

    title: str
    columns: Sequence[Column]
    rows: list[Sequence[str]] = field(default_factory=list)
    boxed: bool = True

    def add_row(self, *cells: str) -> None:
        self.rows.append(cells)


def show_table(grid: Grid, stream: _Stream | None = None) -> None:
    """Print ``grid``; no figure or name is ever cut.

    Elsewhere than on a terminal: plain text, columns as wide as their
    widest cell, no trailing spaces, nothing wrapped. On a terminal: a rich
    table when its columns fit the width with every figure and name whole
    (only prose columns may wrap, at word boundaries); otherwise one block
    per row, each cell on a line of its own under the row's first cell.
    """
    console = (stream or out).console
    say(grid.title, stream)
    if not console.is_terminal:
        for line in _plain_lines(grid):
            console.print(line, soft_wrap=True, markup=False, highlight=False)
        return
    if _least_width(grid) <= console.width:
        console.print(_rich_table(grid))
        return
    for row in grid.rows:
        say(row[0], stream)
        for column, cell in zip(grid.columns[1:], row[1:], strict=True):
            say(f"  {' '.join(column.header.split())}: {cell}", stream, indent=4)


def _least_width(grid: Grid) -> int:
    """The narrowest the rich table can be with no cell cut: whole cells, prose at its longest word;
    one space of padding each side of a cell and a rule between and around the columns."""
    from rich.cells import cell_len

    def least(text: str, prose: bool) -> int:
        parts = text.split() if prose else text.split("\n")
        return max((cell_len(printable(p)) for p in parts), default=0)

    widths = [
        max([least(c.header, False)] + [least(row[i], c.prose) for row in grid.rows])
        for i, c in enumerate(grid.columns)
    ]
    return sum(widths) + 2 * len(widths) + len(widths) + 1


def _plain_lines(grid: Grid) -> list[str]:
    headers = [" ".join(c.header.split()) for c in grid.columns]
    table = [headers] + [[printable(c) for c in row] for row in grid.rows]
    widths = [max(len(r[i]) for r in table) for i in range(len(headers))]
    lines = []
    for r in table:
        cells = [c.rjust(w) if col.right else c.ljust(w) for c, w, col in zip(r, widths, grid.columns, strict=True)]
        lines.append("  ".join(cells).rstrip())
    return lines


def _rich_table(grid: Grid) -> Any:
    from rich import box
    from rich.table import Table

    table = Table(box=box.SQUARE if grid.boxed else box.SIMPLE_HEAD)
    for c in grid.columns:
        table.add_column(
            c.header, justify="right" if c.right else "left", no_wrap=not c.prose, overflow="fold"
        )
    for row in grid.rows:
        table.add_row(*row)
    return table


def unit(description: str) -> str:
    """What a stage counts: samples when it runs the model, replicates for a bootstrap, else steps.

    >>> unit("capturing logits"), unit("vector: bootstrap"), unit("fitting")
    ('samples', 'replicates', '')
    """
    if description.startswith(("capturing", "running")):
        return "samples"
    return "replicates" if description.endswith("bootstrap") else ""


def _rate_column() -> Any:
    from rich.progress import ProgressColumn
    from rich.text import Text

    class RateColumn(ProgressColumn):
        """Samples (or replicates) per second; nothing for a stage counted in steps."""

        def render(self, task: Any) -> Text:
            what = unit(task.description)
            if not what:
                return Text("")
            speed = task.finished_speed or task.speed
            if not speed:  # too quick to measure ("" once done), or not yet measured
                return Text("" if task.finished else f"- {what}/s")
            return Text(f"{speed:,.0f} {what}/s")

    return RateColumn()


@contextlib.contextmanager
def progress_bar(quiet: bool) -> Iterator[ProgressFn]:
    """A rich progress bar on stderr, fed by the stages' progress callback
    ``progress(stage, done, total)``: one bar per stage (capturing logits,
    fitting, bootstrap, running the patched model, ...), drawn from the
    stage's first call. On a terminal the bars are redrawn as they go;
    elsewhere (a pipe, a CI log) rich prints each bar once, complete, when
    the run ends. With ``quiet`` nothing is drawn, but the stage is still
    noted (:data:`stage`) for the line an interruption prints.
    """
    stage.clear()
    if quiet:

        def note(description: str, done: int, total: int) -> None:
            if not stage or stage[-1] != description:
                stage.append(description)

        yield note
        return
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
    )

    bar = Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        _rate_column(),
        TimeElapsedColumn(),
        console=err.console,
        transient=False,
    )
    tasks: dict[str, Any] = {}
    shown: dict[str, float] = {}

    def update(description: str, done: int, total: int) -> None:
        if not tasks:  # start drawing at the first call, not before
            bar.start()
        if description not in tasks:
            stage.append(description)
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
        say(f"warning: {m}", err)


def print_json(data: Any) -> None:
    sys.stdout.write(json.dumps(data, indent=2, sort_keys=True, default=str) + "\n")
