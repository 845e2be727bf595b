"""Ctrl-C that is neither lost nor garbled.

Python raises KeyboardInterrupt wherever the main thread happens to be, and
inside JAX that goes wrong three ways. In JAX's garbage-collection callback
Python prints the exception and drops it, and the run goes on as if Ctrl-C
had never come. In a host callback that compiled code calls (the L-BFGS line
search reaches the objective that way) JAX turns it into a runtime error with
a long traceback. And raised while JAX lowers or compiles a program, it left
native state behind that crashed the interpreter at exit (a segmentation
fault in 2 of 8 tries).

:func:`deliver`, the SIGINT handler that :func:`handling_interrupts`
installs, raises at once in fitrank's own code, NumPy or SciPy (a full solve
stops at once); while JAX or a garbage-collection callback is running it only
records the request, and the next :func:`checkpoint` raises it. The long
loops call one per step (training steps, snapshot solves), and so does every
atomic write before it commits, so an interrupted run never replaces an
earlier result. A second Ctrl-C raises at once, wherever the program is.
"""

from __future__ import annotations

import contextlib
import gc
import signal
import threading

_requested = False
_DEFERRING_PACKAGES = ("jax", "jaxlib")


def deliver(signum, frame) -> None:
    """SIGINT handler: raise KeyboardInterrupt now, or only record it when ``frame`` is inside JAX or a gc callback."""
    global _requested
    if _requested:
        raise KeyboardInterrupt  # the second Ctrl-C
    _requested = True
    if not _must_wait(frame):
        raise KeyboardInterrupt


def _must_wait(frame) -> bool:
    gc_callbacks = {getattr(callback, "__code__", None) for callback in gc.callbacks}
    while frame is not None:
        package = frame.f_globals.get("__name__", "").partition(".")[0]
        if package in _DEFERRING_PACKAGES or frame.f_code in gc_callbacks:
            return True
        frame = frame.f_back
    return False


def requested() -> bool:
    """Whether a Ctrl-C has arrived (under :func:`handling_interrupts`), raised yet or not."""
    return _requested


def checkpoint() -> None:
    """Raise KeyboardInterrupt if a Ctrl-C arrived and was deferred; cheap enough to call every step."""
    if _requested:
        raise KeyboardInterrupt


@contextlib.contextmanager
def handling_interrupts():
    """Install :func:`deliver` for SIGINT for the duration; restore the old handler after.

    Only in the main thread (the only one Python delivers signals to; other
    threads leave the main thread's request alone), and not where SIGINT is
    ignored on purpose (a background job of a shell script starts that way).
    """
    global _requested
    if threading.current_thread() is not threading.main_thread() or \
            signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
        yield
        return
    _requested = False
    previous = signal.signal(signal.SIGINT, deliver)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
        _requested = False
