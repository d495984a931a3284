"""The guides run as written: every ``onnxcal`` command of docs/guide-*.md and of the data pages
(docs/data-*.md), in order, in a fresh directory holding the checkout's fixtures/, each exiting 0; and
where a guide shows a command's output, that output is the real one.

(docs/ci.md, docs/sharding.md and docs/calibrate_in_python.py have tests of their own:
tests/cli/test_cli_verify.py, tests/test_sharding_docs.py, tests/api/test_api.py.)
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import FIXTURES, ROOT

DOCS = ROOT / "docs"
PAGES = sorted(DOCS.glob("guide-*.md")) + sorted(DOCS.glob("data-*.md"))
# the lines of a sample output compared verbatim (the table rows above them are compared word by word)
VERBATIM = ("found:", "class scores:", "batch dim:", "calibration record:", "sha256:", "source:", "fit:")


def _blocks(text: str) -> list[tuple[int, int, list[str]]]:
    """(start, end, lines) of the code blocks of a page: ```sh blocks and blocks indented by 4 spaces."""
    fenced = [(m.start(), m.end(), m.group(1).rstrip("\n").splitlines())
              for m in re.finditer(r"```sh\n(.*?)```", text, re.S)]
    indented = [(m.start(1), m.end(1), [line[4:] for line in m.group(1).rstrip("\n").splitlines()])
                for m in re.finditer(r"(?:(?<=\n\n)|\A)((?:    .*(?:\n|\Z))+)", text)]
    return sorted(fenced + indented)


def steps(text: str) -> list[tuple[str, list[str]]]:
    """(command, the sample output the page shows right after it) for each onnxcal command of a page,
    in order; a command continues over lines ending in a backslash."""
    found: list[tuple[str, list[str]]] = []
    last_end = -10
    for start, end, lines in _blocks(text):
        if lines[0].startswith("onnxcal "):
            command: list[str] = []
            for line in lines:
                command.append(line.rstrip("\\").strip())
                if not line.endswith("\\"):
                    found.append((" ".join(command), []))
                    command = []
        elif found and not found[-1][1] and text[last_end:start].strip() == "":
            found[-1] = (found[-1][0], lines)  # the output shown right below the command
        last_end = end
    return found


def _shown_matches(shown: list[str], real: str) -> None:
    lines = [line.strip() for line in real.splitlines()]
    for line in shown:
        if line.strip().startswith(VERBATIM):
            assert line.strip() in lines, f"shown {line.strip()!r}, not in the real output:\n{real}"
        elif line.strip():  # a table row: its words, in order, in one line of the output
            words = line.split()
            assert any(re.search(r"\W+".join(map(re.escape, words)), out) for out in lines), (line, real)


@pytest.mark.parametrize("page", PAGES, ids=[p.name for p in PAGES])
def test_page_runs_as_written(tmp_path: Path, page: Path) -> None:
    found = steps(page.read_text())
    assert found, f"{page.name} shows no onnxcal command"
    (tmp_path / "fixtures").symlink_to(FIXTURES)
    env = {**os.environ, "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}", "COLUMNS": "200"}
    for command, shown in found:
        r = subprocess.run(["bash", "-c", command], cwd=tmp_path, env=env, capture_output=True, text=True,
                           timeout=600)
        assert r.returncode == 0, f"{page.name}: {command}\n{r.stdout}\n{r.stderr}"
        _shown_matches(shown, r.stdout)


def test_the_guides_show_output_and_every_file_they_make_is_ignored() -> None:
    """The edge guide's inspect samples are compared above; the files the guides and data pages write
    into a checkout are in .gitignore."""
    shown = [out for cmd, out in steps((DOCS / "guide-edge-model.md").read_text()) if cmd.startswith("onnxcal inspect")]
    assert len(shown) == 2 and all(shown)
    written = set()
    for page in PAGES:
        for command, _ in steps(page.read_text()):
            written |= set(re.findall(r"--(?:out|report) (\S+)", command))
    assert {"edge.onnx", "report/", "fit_temperature.json", "logits.npz"} <= written
    for path in sorted(written):  # git's own reading of .gitignore, for files that need not exist
        r = subprocess.run(["git", "check-ignore", "-q", "--no-index", path], cwd=ROOT)
        assert r.returncode == 0, f"{path} (written by a guide) is not in .gitignore"
