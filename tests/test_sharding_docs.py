"""docs/sharding.md run as written: the Slurm job array on a real (one-node) Slurm
cluster, and the Kubernetes indexed Job's command for every index.

Both end with the same check: ``fit`` on the merged shards equals ``fit`` on
one unsharded capture of the same set (the same T to the last bit, the same
metrics), the unsharded capture being what onnxcal's own single-process path
gives.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
import textwrap
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from conftest import DEMO_MODEL, DEMO_VAL, CliResult
from slurm_cluster import ClusterUnavailable, SlurmCluster, start_cluster

from onnxcal.capture import load_captures

DOC = Path(__file__).resolve().parents[1] / "docs" / "sharding.md"
SHARDS = 16  # as in the doc's examples
JOBS_TIMEOUT = 120  # seconds for the whole array and the fit (about 30 s on an idle 2-core machine)


def _example_blocks() -> list[tuple[str, str]]:
    """(kind, body) of the blocks of docs/sharding.md marked ``<!-- sharding-example: KIND -->``.

    ``file NAME`` is written to NAME in the working folder, ``run`` is run there with bash.
    """
    return re.findall(r"<!-- sharding-example: (.+?) -->\n```sh\n(.*?)```", DOC.read_text(), re.S)


def _kubernetes_script() -> str:
    """The shell script of the indexed Job's container (the ``args: - |`` block of the YAML)."""
    yaml = re.search(r"```yaml\n(.*?)```", DOC.read_text(), re.S)
    assert yaml, "docs/sharding.md has no YAML block"
    match = re.search(r"\n( *)args:\n *- \|\n((?:\1 +.*\n)+)", yaml.group(1))
    assert match, "no 'args: - |' script in the indexed Job"
    return textwrap.dedent(match.group(2))


def _work_folder(path: Path) -> Path:
    """A folder laid out as the doc expects: model.onnx and val.npz (the bundled demo)."""
    path.mkdir(exist_ok=True)
    shutil.copyfile(DEMO_MODEL, path / "model.onnx")
    shutil.copyfile(DEMO_VAL, path / "val.npz")
    return path


def _job_logs(work: Path) -> tuple[Path, ...]:
    return tuple(sorted(work.glob("*.log")) + sorted(work.glob("slurm-*.out")))


def _unsharded_fit(work: Path, run_cli: Callable[..., CliResult]) -> dict[str, Any]:
    """Capture the whole set in one go and fit it, with the CLI's defaults."""
    r = run_cli("capture", work / "model.onnx", "--data", work / "val.npz", "--quiet", "--out", work / "whole.npz")
    assert r.code == 0, r.err
    r = run_cli("fit", work / "whole.npz", "--out", work / "fit-whole.json")
    assert r.code == 0, r.err
    fit: dict[str, Any] = json.loads((work / "fit-whole.json").read_text())
    return fit


def _assert_same_fit(merged: dict[str, Any], whole: dict[str, Any], shard_files: list[Path], work: Path) -> None:
    # The merged capture is the unsharded one, row for row, bit for bit.
    cap, one = load_captures(shard_files), load_captures(work / "whole.npz")
    assert np.array_equal(cap.sample_indices(), np.arange(2000)) and np.array_equal(cap.labels, one.labels)
    assert np.array_equal(np.asarray(cap.logits), np.asarray(one.logits))
    # The same T to the last bit (JSON keeps a float's shortest round-trip repr),
    # and every figure of the fit: metrics, intervals, split, options, notes.
    assert float(merged["temperature"]).hex() == float(whole["temperature"]).hex()
    assert merged["parameters"] == whole["parameters"]
    assert {k: v for k, v in merged.items() if k != "capture"} == {k: v for k, v in whole.items() if k != "capture"}
    assert len(merged["capture"]["merged_from"]) == SHARDS and merged["capture"]["shard"] is None
    for key in ("n", "data_total", "data_id", "model_sha256", "num_classes"):
        assert merged["capture"][key] == whole["capture"][key], key


# --------------------------------------------------------------------------
# Slurm


@pytest.fixture
def slurm(request: pytest.FixtureRequest) -> SlurmCluster:
    """A one-node Slurm cluster in a temporary folder, stopped and removed after the test."""
    try:
        cluster = start_cluster()
    except ClusterUnavailable as exc:
        if os.getuid() == 0 and "not installed" not in str(exc):
            pytest.fail(f"the Slurm test cluster did not start, as root:\n{exc}")
        pytest.skip(f"no Slurm test cluster here: {str(exc).splitlines()[0]}")

    def remove() -> None:
        cluster.stop()
        shutil.rmtree(cluster.root, ignore_errors=True)

    request.addfinalizer(remove)
    return cluster


def test_slurm_job_array_works_as_written(
    slurm: SlurmCluster, tmp_path: Path, run_cli: Callable[..., CliResult]
) -> None:
    blocks = _example_blocks()
    assert [k for k, _ in blocks] == ["file capture.sh", "run"]
    work = _work_folder(tmp_path / "shared")
    # The jobs inherit this environment from sbatch: this test's onnxcal comes first on PATH.
    env = slurm.env(extra_path=str(Path(sys.executable).parent))
    for kind, body in blocks:
        if kind.startswith("file "):
            (work / kind.split(" ", 1)[1]).write_text(body)
        else:
            r = subprocess.run(["bash", "-c", "set -euo pipefail\n" + body], cwd=work, env=env,
                               capture_output=True, text=True, timeout=60)
            assert r.returncode == 0, r.stdout + r.stderr + slurm.logs()
    try:
        jobs = slurm.wait_for_jobs(JOBS_TIMEOUT)
    except TimeoutError as exc:
        pytest.fail(f"{exc}\n{slurm.logs(_job_logs(work))}")
    assert len(jobs) == SHARDS + 1, jobs  # the array's tasks and the fit
    failed = {j: s for j, s in jobs.items() if s[0] != "COMPLETED"}
    assert not failed, f"{failed}\n{slurm.logs(_job_logs(work))}"
    shard_files = sorted((work / "captures").glob("shard-*.npz"))
    assert len(shard_files) == SHARDS
    assert "captured 125 x 5 logits" in (work / "capture-7.log").read_text()
    (fit_log,) = work.glob("slurm-*.out")
    assert "wrote fit.json" in fit_log.read_text()
    merged = json.loads((work / "fit.json").read_text())
    _assert_same_fit(merged, _unsharded_fit(work, run_cli), shard_files, work)


# --------------------------------------------------------------------------
# Kubernetes (no cluster: the container's script, run for every index)


def test_kubernetes_indexed_job_command_covers_the_set(
    tmp_path: Path, run_cli: Callable[..., CliResult], monkeypatch: pytest.MonkeyPatch
) -> None:
    """The pod's script with JOB_COMPLETION_INDEX = 0 .. 15, as an indexed Job sets it.

    /bin/sh (as in the Job's ``command``) runs the doc's script with
    ``onnxcal`` defined as a shell function that prints its arguments, one a
    line, and the test then runs that command line with the real onnxcal in
    this process (16 fresh interpreters would take a minute on two cores).
    This checks the index arithmetic and the command line, not Kubernetes:
    the doc says so.
    """
    assert 'command: ["/bin/sh", "-c"]' in DOC.read_text()
    script = _kubernetes_script()
    completions = re.search(r"completions: (\d+)", DOC.read_text())
    assert completions and int(completions.group(1)) == SHARDS
    work = _work_folder(tmp_path / "work")
    (work / "captures").mkdir()
    monkeypatch.chdir(work)
    commands = []
    for index in range(SHARDS):
        pod = subprocess.run(
            ["/bin/sh", "-c", "set -eu\nonnxcal() { printf '%s\\n' onnxcal \"$@\"; }\n" + script],
            env={**os.environ, "JOB_COMPLETION_INDEX": str(index)}, capture_output=True, text=True, timeout=30,
        )
        assert pod.returncode == 0, pod.stderr
        commands.append(pod.stdout.splitlines())
    assert [c[c.index("--shard") + 1] for c in commands] == [f"{i}/{SHARDS}" for i in range(1, SHARDS + 1)]
    for argv in commands:
        assert argv[:2] == ["onnxcal", "capture"], argv
        r = run_cli(*argv[1:])
        assert r.code == 0, r.err
    shard_files = [work / "captures" / f"shard-{i}.npz" for i in range(1, SHARDS + 1)]
    r = run_cli("fit", *shard_files, "--out", work / "fit.json")
    assert r.code == 0, r.err
    merged = json.loads((work / "fit.json").read_text())
    _assert_same_fit(merged, _unsharded_fit(work, run_cli), shard_files, work)
