"""``python -m onnxcal.cli``: the same as the ``onnxcal`` command."""

import sys

from .app import main

if __name__ == "__main__":  # not when pytest imports it for doctests
    sys.exit(main())
