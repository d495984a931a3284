"""SIGINT and SIGTERM: handled like an error, never in the middle of a group of renames.

The command line installs :func:`interrupting` handlers: the first SIGINT or
SIGTERM raises :class:`Interrupted` (carrying the signal's name) in the
main thread, so every ``finally`` and ``except BaseException`` on the
way out runs, as for any error: temporaries are removed, a directory the
run created is removed again. Later signals of the same run are noted and
ignored, so the clean-up itself is not cut short; SIGKILL still stops the
process at once.

:func:`deferred` holds both signals back across a short critical section
(the renames that publish a group of outputs, the removal of temporaries):
a signal that arrives meanwhile is delivered when the section ends, to
whatever handler was in force before (the CLI's, Python's default
KeyboardInterrupt, or the default action of SIGTERM). It works at the
Python level, so it holds whichever thread the kernel delivered the signal
to (onnxruntime runs threads of its own, which ``pthread_sigmask`` in the
main thread would not cover).

A signal's Interrupted can be lost: raised while Python runs a garbage
collector's callback or a ``__del__`` (a weakref callback of a plotting
library), it is printed as "Exception ignored" and the run goes on. So
:func:`_raise` also notes the signal: :func:`interrupting` keeps such a lost
Interrupted off stderr, :func:`raise_if_received` (called before a group of
outputs is published) raises it again, and the command line ends a run that
received one as interrupted.
"""

from __future__ import annotations

import contextlib
import signal
import sys
import threading
from collections.abc import Iterator

SIGNALS = (signal.SIGINT, signal.SIGTERM)
_received: list[str] = []  # the signals _raise was called for in this run, in order


class Interrupted(BaseException):
    """The run was stopped by SIGINT or SIGTERM (``args[0]``: the signal's name).

    A BaseException, like KeyboardInterrupt, so ``except Exception`` does
    not swallow it; unlike KeyboardInterrupt, the command-line parser does
    not turn it into an abort of its own.
    """


def _in_main_thread() -> bool:
    return threading.current_thread() is threading.main_thread()


@contextlib.contextmanager
def deferred() -> Iterator[None]:
    """Hold SIGINT and SIGTERM back until the block ends, then deliver them.

    Outside the main thread (where Python cannot set handlers) the block
    runs unprotected; so does it when a handler was installed outside
    Python (``signal.getsignal`` returns None), which cannot be restored.
    """
    previous = {s: signal.getsignal(s) for s in SIGNALS} if _in_main_thread() else {}
    if not previous or any(h is None for h in previous.values()):
        yield
        return
    received: list[int] = []
    for s in SIGNALS:
        signal.signal(s, lambda signum, frame: received.append(signum))
    try:
        yield
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
        for signum in dict.fromkeys(received):  # once each, in the order they came
            signal.raise_signal(signum)


def _raise(signum: int, frame: object) -> None:
    for s in SIGNALS:  # the run is stopping: later signals must not cut the clean-up short
        signal.signal(s, _note)
    name = signal.Signals(signum).name
    _received.append(name)
    raise Interrupted(name)


def received() -> str | None:
    """The first signal that stopped (or should have stopped) this run, else None."""
    return _received[0] if _received else None


def raise_if_received() -> None:
    """Raise Interrupted again when a signal's was lost (see the module's doc); else nothing."""
    if _received:
        raise Interrupted(_received[0])


def _quiet_lost_interrupt(unraisable: sys.UnraisableHookArgs) -> None:
    """sys.unraisablehook: an Interrupted lost in a callback is noted already, not printed."""
    if isinstance(unraisable.exc_value, Interrupted):
        return
    sys.__unraisablehook__(unraisable)


def _note(signum: int, frame: object) -> None:
    return None


@contextlib.contextmanager
def interrupting() -> Iterator[None]:
    """Within the block, SIGINT and SIGTERM raise Interrupted('SIGINT' / 'SIGTERM').

    When the handlers were already installed for the process (by
    :func:`install`, at the console script's start) they are left to ignore
    both signals afterwards: the process is about to exit with the status
    the block decided. Otherwise the previous handlers are restored (the
    CLI's ``main`` may be called in-process, by tests). Outside the main
    thread nothing changes.
    """
    if not _in_main_thread():
        yield
        return
    previous = {s: signal.getsignal(s) for s in SIGNALS}
    installed_before = all(h in (_raise, _note) for h in previous.values())
    hook = sys.unraisablehook
    _received.clear()
    install()
    sys.unraisablehook = _quiet_lost_interrupt
    try:
        yield
    finally:
        sys.unraisablehook = hook
        if not installed_before:  # called in-process (tests): what this run received ends with it
            _received.clear()
        for s, handler in previous.items():
            if installed_before:
                signal.signal(s, _note)
            elif handler is not None:
                signal.signal(s, handler)


def install() -> None:
    """Make SIGINT and SIGTERM raise Interrupted from now on (main thread only)."""
    for s in SIGNALS:
        signal.signal(s, _raise)


def stopping() -> None:
    """The run is ending: ignore further SIGINT and SIGTERM (main thread only)."""
    if _in_main_thread():
        for s in SIGNALS:
            signal.signal(s, _note)


def name_of(exc: BaseException) -> str:
    """The signal an Interrupted (or a KeyboardInterrupt) stands for: its argument, else SIGINT."""
    if exc.args and exc.args[0] in ("SIGINT", "SIGTERM"):
        return str(exc.args[0])
    return "SIGINT"


def exit_status(name: str) -> int:
    """128 + the signal's number, as a shell reports a process stopped by it: 130, 143."""
    return 128 + int(signal.Signals[name])
