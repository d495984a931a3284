"""The fuzz targets on their seed corpus and on a few hundred fixed mutations (no atheris needed).

This keeps the harness of fuzz_load.py working in the default suite, and
replays, deterministically, the kind of inputs the fuzzer found: only
OnnxcalError may escape the boundary (targets.py says what each target runs).
The bounded coverage-guided run is ``tests/fuzz/fuzz_load.py`` (docs/fuzzing.md).
"""

from __future__ import annotations

import random

import pytest
import targets

MUTATIONS = {"model": 300, "npz": 150, "capture": 150, "fit": 150}
INTERESTING = [b"\x00", b"\xff", b"\x7f", b"\x80", b"\x00\x00\x00\x00", b"\xff\xff\xff\xff", b"\x01\x00\x00\x80"]


def byte_mutate(data: bytes, max_size: int, rnd: random.Random) -> bytes:
    """One of the usual byte mutations: flip, overwrite, insert, erase, truncate, duplicate."""
    b = bytearray(data or b"\x00")
    op = rnd.randrange(6)
    i = rnd.randrange(len(b))
    if op == 0:
        b[i] ^= 1 << rnd.randrange(8)
    elif op == 1:
        v = rnd.choice(INTERESTING)
        b[i : i + len(v)] = v
    elif op == 2:
        b[i:i] = bytes(rnd.randrange(256) for _ in range(rnd.randint(1, 8)))
    elif op == 3:
        del b[i : i + rnd.randint(1, 16)]
    elif op == 4:
        del b[i:]
    else:
        j = rnd.randrange(len(b))
        b[i:i] = b[j : j + rnd.randint(1, 64)]
    return bytes(b[:max_size])


@pytest.mark.parametrize("name", sorted(targets.TARGETS))
def test_seeds_pass_and_mutations_raise_only_onnxcal_errors(name):
    target, seeds = targets.TARGETS[name], list(targets.seeds(name).values())
    assert seeds
    for data in seeds:
        target(data)
    rnd = random.Random(f"onnxcal-fuzz-{name}")
    for i in range(MUTATIONS[name]):
        data = rnd.choice(seeds)
        for _ in range(rnd.randint(1, 4)):
            if name == "model":
                data = targets.mutate_model(
                    data, 1 << 16, rnd.randrange(2**32), lambda d, m: byte_mutate(d, m, rnd)
                )
            else:
                data = byte_mutate(data, 1 << 16, rnd)
        try:
            target(data)
        except Exception as exc:  # pragma: no cover - the failure message is the point
            raise AssertionError(f"mutation {i} of target {name} raised {type(exc).__name__}: {exc}") from exc
