"""The ``onnxcal`` console script: signal handlers first, then the package.

Importing onnxcal (numpy, onnx, scipy, typer) takes about a second and a
half, and a SIGINT or SIGTERM in that time would otherwise end the process
with Python's traceback or no word at all. This module lies outside the
package, so it runs before any of that is imported: it notes either signal
while the package is imported (interrupting an extension module's import
can crash it: numpy turned it into an ImportError, other modules aborted),
then ends the run with one line and status 130 or 143 if one came. Otherwise
it hands over to ``onnxcal.cli.main``, whose own handlers remove the run's
temporaries (see ``onnxcal/_signals.py``), and ignores both signals once it
returns, while the interpreter shuts down. ``python -m onnxcal`` imports the
package first and is covered from the moment the CLI starts until it returns.
"""

import signal
import sys

SIGNALS = (signal.SIGINT, signal.SIGTERM)
_received: list[str] = []


def _note(signum: int, frame: object) -> None:
    _received.append(signal.Signals(signum).name)


def _interrupted(name: str) -> int:
    for s in SIGNALS:
        signal.signal(s, signal.SIG_IGN)
    sys.stderr.write(f"onnxcal: interrupted by {name}; no output was written\n")
    return 128 + int(signal.Signals[name])


def main() -> int:
    """Run the onnxcal command line; return its exit status."""
    for s in SIGNALS:
        signal.signal(s, _note)
    if [a for a in sys.argv[1:] if a != "--debug"] == ["--version"]:  # without importing the command line
        from onnxcal import __version__

        sys.stdout.write(f"onnxcal {__version__}\n")
        return 0
    from onnxcal import _signals, cli  # a signal meanwhile is only noted

    try:
        _signals.install()  # from here on a signal raises _signals.Interrupted
        if _received:
            return _interrupted(_received[0])
        return cli.main()
    except (_signals.Interrupted, KeyboardInterrupt) as exc:  # before cli.main could report it itself
        return _interrupted(_signals.name_of(exc))
    finally:
        # The run is over and the process exits next. Ignored signals stay ignored while Python
        # shuts down (it resets only handlers of its own to the default action, which would
        # end the process with no word after a complete run).
        for s in SIGNALS:
            signal.signal(s, signal.SIG_IGN)


if __name__ == "__main__":
    sys.exit(main())
