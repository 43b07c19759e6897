"""Ctrl-C that no library can swallow.

Some compiled code the workbench calls (nutpie's sampler set-up, PyTensor's
compiled functions) may catch a ``KeyboardInterrupt`` and carry on, so a
command could finish and overwrite its files after the user pressed Ctrl-C.
The command line therefore notes every SIGINT in a flag that stays set;
the engine and the writers ask :func:`raise_if_interrupted` before going on,
so once interrupted no further output file is written. An error that the
interrupt caused inside compiled code (numba reports it as a ``SystemError``)
is reported as the interrupt it was.
"""

from __future__ import annotations

import contextlib
import signal
import threading

_interrupted = threading.Event()


def _note_and_raise(signum, frame):
    _interrupted.set()
    raise KeyboardInterrupt


@contextlib.contextmanager
def watched(last: bool = False):
    """Note every SIGINT while the block runs (main thread only; a no-op elsewhere).

    ``last`` is for a process that exits after the block: a Ctrl-C that
    arrives once the work is done and its files are written is then ignored
    instead of killing the process on its way out.
    """
    _interrupted.clear()
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGINT, _note_and_raise)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, signal.SIG_IGN if last else previous)


def interrupted() -> bool:
    """Whether a SIGINT arrived inside the current :func:`watched` block."""
    return _interrupted.is_set()


def raise_if_interrupted() -> None:
    """Raise ``KeyboardInterrupt`` when a SIGINT arrived inside :func:`watched`."""
    if _interrupted.is_set():
        raise KeyboardInterrupt


@contextlib.contextmanager
def interrupts_kept():
    """Let Ctrl-C inside compiled code arrive as ``KeyboardInterrupt``.

    When the signal lands while Rust code is calling back into Python, pyo3
    turns the ``KeyboardInterrupt`` into a ``PanicException`` (a
    ``BaseException`` whose text names the interrupt); callers, and the
    command line's exit status 130, expect the interrupt itself.
    """
    try:
        yield
    except BaseException as err:
        if type(err).__name__ == "PanicException" and "KeyboardInterrupt" in str(err):
            raise KeyboardInterrupt from None
        raise
    raise_if_interrupted()
