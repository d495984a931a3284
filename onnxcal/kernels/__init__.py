"""Compiled kernels: loops that read each value once where numpy would sweep memory once per operation.

A pass over a million rows of logits is bound by the exponential; numpy computes the exponential, each product and
each sum as a separate sweep over the chunk, so a pass that needs five sums costs several times one exponential.
The kernels in this package are the same arithmetic written as one loop per row and compiled by numba (a general-purpose
JIT compiler for numpy code). They are used only:

- when ``enabled()`` (the environment variable ``ONNXCAL_COMPILED=0`` turns them off: the numpy code they replace
  stays, as the reference the tests compare them against), and
- for work large enough to repay numba's import (about 0.2 s) and, the first time on a machine, its compilation
  (about a second per kernel, then cached on disk): see ``worth_it``.

numba is imported only by the kernel modules themselves, and those only when a kernel is first needed, so that
``import onnxcal`` and the commands that fit nothing stay fast (issue 14's start-up targets).
"""

from __future__ import annotations

import os

ENV = "ONNXCAL_COMPILED"

# In a fresh process numba's import and loading a kernel from its cache cost 0.8 to 1.2 s (measured: 0.2-0.48 s
# import, 0.59-0.81 s cache load, the same for a one-line function); a compiled sweep pass saves about 40 % of a numpy
# pass of ~1 ns per value, so a fit of three or four passes repays that from about 3e8 values (300 000 rows x 1 000
# classes). The bootstrap saves about 7 ns per replicate and row (18 ms -> 8 ms per replicate at 1 000 000 rows): it
# repays the same cost from about 1.3e8 replicate-rows (200 replicates of 670 000 rows).
MIN_VALUES = 1 << 28
MIN_REPLICATE_ROWS = 1 << 27


def enabled() -> bool:
    """True unless ``ONNXCAL_COMPILED=0`` (or ``false``/``no``/``off``) asks for the numpy code."""
    return os.environ.get(ENV, "1").strip().lower() not in {"0", "false", "no", "off"}


def worth_it(values: int, minimum: int | None = None) -> bool:
    """Whether a job over ``values`` numbers should use the compiled kernels (``minimum``: default ``MIN_VALUES``)."""
    return enabled() and values >= (MIN_VALUES if minimum is None else minimum)
