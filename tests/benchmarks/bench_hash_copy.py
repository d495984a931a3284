"""Why ``patch`` hashes on a second thread: SHA-256 and the kernel's copy of one file, alone and together.

Writes a file of ``--gib`` GiB of random bytes in a temporary folder (removed at
the end), then, alternating, ``--rounds`` times each:

* ``hash``: SHA-256 of the file, read 4 MiB at a time into one buffer (as
  ``onnxcal.graph.io._hash_range`` reads);
* ``copy``: ``os.copy_file_range`` of the file into a new one, then fsync (as
  ``patch`` copies the weights into OUT.data);
* ``threads``: both at once, the hash on a second thread (what ``patch`` does);
* ``pipelined``: one pass, each block read once into user space, written with
  ``pwrite`` on this thread and hashed on a second (the alternative: one read
  of the source instead of two, but no ``copy_file_range``, so no reflinks);
* ``cp + sync``: coreutils' ``cp``, then ``sync`` of the copy.

Run: ``.venv/bin/python tests/benchmarks/bench_hash_copy.py --gib 3 --rounds 5``
(about twice ``--gib`` of free disk). Figures: docs/benchmarks.md.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import queue
import shutil
import statistics
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path

BLOCK = 1 << 22


def hash_file(path: Path) -> str:
    fd = os.open(path, os.O_RDONLY)
    digest, buffer, pos = hashlib.sha256(), memoryview(bytearray(BLOCK)), 0
    while n := os.preadv(fd, [buffer], pos):
        digest.update(buffer[:n])
        pos += n
    os.close(fd)
    return digest.hexdigest()


def copy(path: Path, out: Path) -> None:
    src, dst = os.open(path, os.O_RDONLY), os.open(out, os.O_RDWR | os.O_CREAT | os.O_TRUNC)
    size, done = os.fstat(src).st_size, 0
    while done < size:
        done += os.copy_file_range(src, dst, size - done, done, done)
    os.fsync(dst)
    os.close(src)
    os.close(dst)


def threads(path: Path, out: Path) -> str:
    found: list[str] = []
    worker = threading.Thread(target=lambda: found.append(hash_file(path)))
    worker.start()
    copy(path, out)
    worker.join()
    return found[0]


def pipelined(path: Path, out: Path) -> str:
    src, dst = os.open(path, os.O_RDONLY), os.open(out, os.O_RDWR | os.O_CREAT | os.O_TRUNC)
    digest, pos = hashlib.sha256(), 0
    full: queue.Queue[tuple[memoryview, int] | None] = queue.Queue(1)
    free: queue.Queue[memoryview] = queue.Queue()
    for _ in range(2):
        free.put(memoryview(bytearray(BLOCK)))

    def hasher() -> None:
        while (item := full.get()) is not None:
            digest.update(item[0][:item[1]])
            free.put(item[0])

    worker = threading.Thread(target=hasher)
    worker.start()
    while True:
        buffer = free.get()
        n = os.preadv(src, [buffer], pos)
        if not n:
            break
        os.pwrite(dst, buffer[:n], pos)
        full.put((buffer, n))
        pos += n
    full.put(None)
    worker.join()
    os.fsync(dst)
    os.close(src)
    os.close(dst)
    return digest.hexdigest()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--gib", type=float, default=3.0)
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="onnxcal-bench-hash-copy-"))
    try:
        src, out = folder / "source.bin", folder / "copy.bin"
        block = os.urandom(64 << 20)
        with open(src, "wb") as fh:
            for _ in range(int(args.gib * 16)):
                fh.write(block)
        expected = hash_file(src)
        cases: dict[str, Callable[[], object]] = {
            "hash": lambda: hash_file(src),
            "copy": lambda: copy(src, out),
            "threads": lambda: threads(src, out),
            "pipelined": lambda: pipelined(src, out),
            "cp + sync": lambda: subprocess.run(["sh", "-c", f"cp '{src}' '{out}' && sync '{out}'"], check=True),
        }
        times: dict[str, list[float]] = {name: [] for name in cases}
        for _ in range(args.rounds):
            for name, run in cases.items():
                started = time.perf_counter()
                digest = run()
                times[name].append(time.perf_counter() - started)
                if isinstance(digest, str):
                    assert digest == expected, f"{name} hashed something else"
                out.unlink(missing_ok=True)
        print(f"{src.stat().st_size / 2**30:.2f} GiB, {args.rounds} alternating rounds, "
              f"load average {os.getloadavg()[0]:.1f} at the end")
        for name, values in times.items():
            rounds = " ".join(f"{v:.2f}" for v in values)
            print(f"  {name:10s} median {statistics.median(values):5.2f} s   each round: {rounds}")
        both = statistics.median(times["threads"])
        apart = statistics.median(h + c for h, c in zip(times["hash"], times["copy"], strict=True))
        print(f"  threads / (hash + copy), medians: {both / apart:.2f}")
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
