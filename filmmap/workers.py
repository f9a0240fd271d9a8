"""Worker processes that end when their parent dies.

A process pool's workers wait for tasks on a pipe that other workers also hold open, so
when the parent is killed (``kill -9``, an out-of-memory kill) they never see the end of
the pipe and live on, reparented to init, holding their memory.  Every pool of filmmap
therefore starts its workers with `end_with_parent`: a daemon thread in each worker polls
its parent's process id and ends the worker at once when the parent is gone (the worker
is then reparented, so ``os.getppid()`` changes).

``prctl(PR_SET_PDEATHSIG)`` is not used: on Linux it fires when the *thread* that created
the worker exits, not the process (prctl(2)), and pools may create workers from a helper
thread, so it could end healthy workers.
"""

from __future__ import annotations

import os
import threading
import time

PARENT_POLL_S = 0.25
"""How often a worker checks that its parent is alive, s (common practice, no source)."""


def _watch_parent(parent_pid, poll_s):
    while True:
        if os.getppid() != parent_pid:
            os._exit(1)    # no cleanup to do: the parent that wanted the results is gone
        time.sleep(poll_s)


def end_with_parent(poll_s=PARENT_POLL_S):
    """Pool initializer: end this worker process when its parent process dies.

    Parameters
    ----------
    poll_s : float
        Polling interval, s; the worker ends within about this time of its parent.
    """
    threading.Thread(target=_watch_parent, args=(os.getppid(), poll_s),
                     name="filmmap-parent-watch", daemon=True).start()


BACKGROUND_NICE = 5
"""How much lower the scheduling priority of background work is (``os.nice``): when the
cores are short, the process whose work everything waits for runs first (common practice,
no source)."""

_lowered = False


def lower_priority(nice=BACKGROUND_NICE):
    """Lower this process's scheduling priority once (later calls do nothing).

    Called by a worker when it starts work whose results are needed only at the end (the
    wafer maps) while other processes do the work the caller waits for (the reports, the
    contact sheet they show).

    Parameters
    ----------
    nice : int
        Added to the process's niceness (``os.nice``; where the platform has none, or it is
        not allowed, ignored).
    """
    global _lowered
    if _lowered:
        return
    _lowered = True
    try:
        os.nice(int(nice))
    except (AttributeError, OSError):
        pass    # no nice on this platform, or not allowed: the same priority then
