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

# Below this many values a pass costs a few tens of milliseconds with numpy: numba's import alone would cost more.
MIN_VALUES = 1 << 24


def enabled() -> bool:
    """True unless ``ONNXCAL_COMPILED=0`` (or ``false``/``no``/``off``) asks for the numpy code."""
    return os.environ.get(ENV, "1").strip().lower() not in {"0", "false", "no", "off"}


def worth_it(values: int) -> bool:
    """Whether a job over ``values`` numbers should use the compiled kernels."""
    return enabled() and values >= MIN_VALUES
