"""A throwaway single-node Slurm cluster on this machine, for tests.

Debian's ``slurm-wlm`` and ``munge``: munged, slurmctld and slurmd run in the
foreground as children of the test, on free loopback ports, with every file
they use (slurm.conf, munge key and socket, state, spool, logs, pid files)
under one temporary folder. No cgroups and no systemd: process tracking by
parent pid (``proctrack/linuxproc``), no task binding (``task/none``), no
accounting. Each daemon is stopped by the id it was started with.

Used by ``tests/test_sharding_docs.py``; see DEVELOPERS.md ("The Slurm test").
"""

from __future__ import annotations

import os
import pwd
import shutil
import signal
import socket
import subprocess
import tempfile
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

# Where Debian puts the daemons (/usr/sbin is not on a normal user's PATH).
_SEARCH = os.pathsep.join([os.environ.get("PATH", ""), "/usr/sbin", "/sbin"])
DAEMONS = ("munged", "slurmctld", "slurmd")
CLIENTS = ("sbatch", "squeue", "scontrol", "scancel", "sinfo")
NODE = "onnxcal1"
# Enough CPUs that every task of a 16-task array asking 4 CPUs runs at once.
# slurmd takes the configured figure, not the hardware's (config_overrides):
# the node is oversubscribed, which the tiny models of the tests allow.
NODE_CPUS = 64
# States a job leaves no more (squeue's long names).
FINAL = {"COMPLETED", "FAILED", "CANCELLED", "TIMEOUT", "NODE_FAIL", "PREEMPTED",
         "OUT_OF_MEMORY", "BOOT_FAIL", "DEADLINE"}


class ClusterUnavailable(Exception):
    """The cluster cannot run here (packages missing, daemons do not start)."""


def missing_programs() -> list[str]:
    """The programs of munge and Slurm not installed here."""
    return [p for p in DAEMONS + CLIENTS if shutil.which(p, path=_SEARCH) is None]


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _tail(path: Path, lines: int = 40) -> str:
    try:
        text = path.read_text(errors="replace").splitlines()
    except OSError:
        return f"--- {path.name}: (none)"
    return f"--- {path.name}, last {min(lines, len(text))} lines:\n" + "\n".join(text[-lines:])


@dataclass
class SlurmCluster:
    """One slurmctld and one slurmd (node ``onnxcal1``) with their munged, under ``root``."""

    root: Path
    user: str = field(default_factory=lambda: pwd.getpwuid(os.getuid()).pw_name)
    ctld_port: int = field(default_factory=_free_port)
    slurmd_port: int = field(default_factory=_free_port)
    processes: dict[str, subprocess.Popen[bytes]] = field(default_factory=dict)

    @property
    def conf(self) -> Path:
        return self.root / "slurm.conf"

    @property
    def socket(self) -> Path:
        return self.root / "munge" / "munge.socket"

    def env(self, extra_path: str = "") -> dict[str, str]:
        """The environment for Slurm's clients (and so for the jobs, which inherit it)."""
        path = os.pathsep.join(p for p in (extra_path, os.environ.get("PATH", ""), "/usr/sbin") if p)
        # Nothing of a Slurm job this test may itself run in (SBATCH_* are sbatch's option defaults).
        outer = ("SLURM_", "SBATCH_", "SALLOC_", "SRUN_", "SQUEUE_", "SINFO_", "SCANCEL_")
        env = {k: v for k, v in os.environ.items() if not k.startswith(outer)}
        return {**env, "PATH": path, "SLURM_CONF": str(self.conf)}

    def write_config(self) -> None:
        for d in ("munge", "state", "spool", "log"):
            (self.root / d).mkdir(parents=True, exist_ok=True)
        self.root.chmod(0o755)  # munged wants its socket reachable
        key = self.root / "munge" / "munge.key"
        key.write_bytes(os.urandom(1024))
        key.chmod(0o600)
        host = socket.gethostname().split(".")[0]  # slurmctld checks that it runs on SlurmctldHost
        r = self.root
        self.conf.write_text(
            f"""\
ClusterName=onnxcaltest
SlurmctldHost={host}(127.0.0.1)
SlurmctldPort={self.ctld_port}
SlurmdPort={self.slurmd_port}
SlurmUser={self.user}
SlurmdUser={self.user}
AuthType=auth/munge
CredType=cred/munge
AuthInfo=socket={self.socket}
StateSaveLocation={r}/state
SlurmdSpoolDir={r}/spool
SlurmctldPidFile={r}/slurmctld.pid
SlurmdPidFile={r}/slurmd.pid
SlurmctldLogFile={r}/log/slurmctld.log
SlurmdLogFile={r}/log/slurmd.log
SlurmctldDebug=info
SlurmdDebug=info
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
MpiDefault=none
SchedulerType=sched/builtin
SelectType=select/cons_tres
SelectTypeParameters=CR_CPU
ReturnToService=2
SlurmdParameters=config_overrides
NodeName={NODE} NodeAddr=127.0.0.1 CPUs={NODE_CPUS} State=UNKNOWN
PartitionName=test Nodes={NODE} Default=YES MaxTime=INFINITE State=UP
"""
        )

    def _spawn(self, name: str, *args: str) -> None:
        log = open(self.root / "log" / f"{name}.stderr", "wb")  # noqa: SIM115 (closed with the process)
        with log:
            self.processes[name] = subprocess.Popen(
                [shutil.which(name, path=_SEARCH) or name, *args],
                stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT,
                env=self.env(), start_new_session=True,
            )

    def start(self, timeout: float = 30.0) -> None:
        """Start munged, slurmctld and slurmd; return once the node is idle.

        Raises ClusterUnavailable (with the logs) when a daemon exits or the
        node does not come up within ``timeout`` seconds.
        """
        r = self.root
        self.write_config()
        self._spawn(
            "munged", "--foreground", "--force", f"--socket={self.socket}",
            f"--key-file={r}/munge/munge.key", f"--pid-file={r}/munge/munged.pid",
            f"--log-file={r}/log/munged.log", f"--seed-file={r}/munge/munged.seed",
        )
        self._wait_for(lambda: self.socket.exists(), timeout, "munged's socket")
        self._spawn("slurmctld", "-D", "-f", str(self.conf))
        self._wait_for(lambda: self.run("sinfo", "-h").returncode == 0, timeout, "slurmctld")
        self._spawn("slurmd", "-D", "-f", str(self.conf), "-N", NODE)
        self._wait_for(lambda: self.node_state() == "idle", timeout, f"node {NODE} idle")

    def _wait_for(self, ready: Callable[[], bool], timeout: float, what: str) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            dead = [n for n, p in self.processes.items() if p.poll() is not None]
            if dead:
                raise ClusterUnavailable(f"{', '.join(dead)} exited while waiting for {what}\n{self.logs()}")
            if ready():
                return
            time.sleep(0.2)
        raise ClusterUnavailable(f"no {what} after {timeout:.0f} s\n{self.logs()}")

    def run(
        self, *args: str, env: Mapping[str, str] | None = None, timeout: float = 30.0
    ) -> subprocess.CompletedProcess[str]:
        """A Slurm client command against this cluster."""
        return subprocess.run(
            [shutil.which(args[0], path=_SEARCH) or args[0], *args[1:]],
            env=dict(env or self.env()), capture_output=True, text=True, timeout=timeout,
        )

    def node_state(self) -> str:
        r = self.run("sinfo", "-h", "-n", NODE, "-o", "%T")
        return str(r.stdout).strip()

    def jobs(self) -> dict[str, tuple[str, str]]:
        """Every job and array task the controller still knows: id -> (state, reason)."""
        r = self.run("squeue", "-h", "-r", "-t", "all", "-o", "%i|%T|%r")
        jobs = {}
        for line in r.stdout.splitlines():
            job, state, reason = line.split("|")
            jobs[job] = (state, reason)
        return jobs

    def wait_for_jobs(self, timeout: float) -> dict[str, tuple[str, str]]:
        """Wait until every job has finished, or one failed; raise TimeoutError past ``timeout``."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            jobs = self.jobs()
            if jobs and all(state in FINAL for state, _ in jobs.values()):
                return jobs
            if any(state != "COMPLETED" and state in FINAL for state, _ in jobs.values()):
                return jobs  # a failed task: the dependent fit will never run
            time.sleep(0.5)
        raise TimeoutError(f"Slurm jobs still running after {timeout:.0f} s: {self.jobs()}")

    def logs(self, extra: tuple[Path, ...] = ()) -> str:
        """The tails of the daemons' logs (and of ``extra`` files), for failure messages.

        A daemon in the foreground may log to stderr only (munged does); its
        log file is shown when it has one, else what it printed.
        """
        tails = []
        for name in DAEMONS:
            log = self.root / "log" / f"{name}.log"
            has_log = log.exists() and log.stat().st_size > 0
            tails.append(_tail(log if has_log else self.root / "log" / f"{name}.stderr"))
        return "\n".join(tails + [_tail(p) for p in extra])

    def stop(self) -> None:
        """Cancel every job, stop the daemons (slurmd, slurmctld, munged) by their ids."""
        if "slurmctld" in self.processes and self.processes["slurmctld"].poll() is None:
            try:
                self.run("scancel", "--user", self.user, timeout=10)
                deadline = time.monotonic() + 15
                while time.monotonic() < deadline and any(s not in FINAL for s, _ in self.jobs().values()):
                    time.sleep(0.3)
            except (OSError, subprocess.SubprocessError):
                pass  # stop the daemons all the same
        for name in ("slurmd", "slurmctld", "munged"):
            proc = self.processes.pop(name, None)
            if proc is None or proc.poll() is not None:
                continue
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=10)


def start_cluster() -> SlurmCluster:
    """A running cluster in a new temporary folder; raise ClusterUnavailable when it cannot run here.

    The folder sits directly in the temporary directory: munge's socket path
    must stay under the 108 bytes of a Unix socket address.
    """
    missing = missing_programs()
    if missing:
        raise ClusterUnavailable(
            f"{', '.join(missing)} not installed (Debian: apt-get install slurm-wlm munge)"
        )
    last: ClusterUnavailable | None = None
    for _ in range(2):  # a port taken between choosing and binding it: once more with others
        cluster = SlurmCluster(Path(tempfile.mkdtemp(prefix="onnxcal-slurm-")))
        try:
            cluster.start()
            return cluster
        except ClusterUnavailable as exc:
            last = exc
            cluster.stop()
            shutil.rmtree(cluster.root, ignore_errors=True)
            if "Address already in use" not in str(exc):
                break
    assert last is not None
    raise last


if __name__ == "__main__":  # a cluster to try things on: python tests/slurm_cluster.py
    signal.signal(signal.SIGTERM, signal.default_int_handler)  # stop cleanly on kill PID too
    cluster = start_cluster()
    print(f"Slurm test cluster up in {cluster.root}\n  export SLURM_CONF={cluster.conf}\nCtrl-C stops it.")
    try:
        signal.pause()
    except KeyboardInterrupt:
        pass
    finally:
        cluster.stop()
        shutil.rmtree(cluster.root, ignore_errors=True)
