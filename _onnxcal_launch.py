"""The ``onnxcal`` console script: signal handlers first, then the package.

Importing onnxcal (numpy, onnx, scipy, typer) takes about a second and a
half, and a SIGINT or SIGTERM in that time would otherwise end the process
with Python's traceback or no word at all. This module lies outside the
package, so it runs before any of that is imported: it installs handlers
that turn either signal into a clean exit (one line, status 130 or 143),
then hands over to ``onnxcal.cli.main``, whose own handlers remove the run's
temporaries (see ``onnxcal/_signals.py``), and ignores both signals once it
returns, while the interpreter shuts down. ``python -m onnxcal`` imports the
package first and is covered from the moment the CLI starts until it returns.
"""

import signal
import sys


def _stop(signum, frame):
    for s in (signal.SIGINT, signal.SIGTERM):
        signal.signal(s, signal.SIG_IGN)
    raise KeyboardInterrupt(signal.Signals(signum).name)


def main() -> int:
    """Run the onnxcal command line; return its exit status."""
    for s in (signal.SIGINT, signal.SIGTERM):
        signal.signal(s, _stop)
    try:
        from onnxcal import _signals, cli

        _signals.install()
    except KeyboardInterrupt as exc:  # nothing has been read or written yet
        name = exc.args[0] if exc.args and exc.args[0] in ("SIGINT", "SIGTERM") else "SIGINT"
        sys.stderr.write(f"onnxcal: interrupted by {name}; no output was written\n")
        return 128 + int(signal.Signals[name])
    try:
        return cli.main()
    finally:
        # The run is over and the process exits next. Ignored signals stay ignored while Python
        # shuts down (it resets only handlers of its own to the default action, which would
        # end the process with no word after a complete run).
        for s in (signal.SIGINT, signal.SIGTERM):
            signal.signal(s, signal.SIG_IGN)


if __name__ == "__main__":
    sys.exit(main())
