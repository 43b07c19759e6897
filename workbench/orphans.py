"""Worker processes that end themselves when the process that started them is gone.

A pool worker blocked in a long fit does not notice that its parent was
killed (SIGKILL leaves it no time to stop the pool). :func:`exit_with_parent`
is a pool ``initializer``: it starts a daemon thread that looks every
:data:`POLL_SECONDS` whether the parent still lives and ends the worker at
once when it does not.
"""

from __future__ import annotations

import os
import threading
import time

# How often a worker looks for its parent: a second costs nothing and an
# orphan stops holding a core within about that time.
POLL_SECONDS = 1.0


def exit_with_parent(parent: int) -> None:
    """Pool initializer: end this process when process ``parent`` is gone.

    ``parent`` is the parent's pid, passed in when the pool is made (the
    worker's own ``os.getppid()`` becomes another process once it is orphaned).
    """
    threading.Thread(target=_watch, args=(parent,), name="exit-with-parent", daemon=True).start()


def _watch(parent: int) -> None:
    while _alive(parent) and os.getppid() == parent:
        time.sleep(POLL_SECONDS)
    os._exit(1)  # no clean-up: the parent that would collect the results is gone


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # it exists, under another user
    return True
