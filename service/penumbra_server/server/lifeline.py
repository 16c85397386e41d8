"""Worker processes that end with their server, however the server ends.

A pool worker blocks on its call queue; when the server is killed (SIGKILL, OOM killer, a
batch system ending the job) nothing ever closes that queue, because every worker holds both
ends of its pipe. Left alone, the workers (hundreds of MB each) and the resource tracker they
keep alive linger. Each worker therefore runs :func:`watch_parent` as its pool initializer: a
daemon thread that notices the parent is gone (the worker was re-parented, so ``getppid()``
changed) and ends the worker at once.

Why polling and not ``prctl(PR_SET_PDEATHSIG)``: Linux sends that signal when the *thread*
that spawned the child exits, not the process, and a process pool may spawn replacement
workers from whichever thread submits; polling is also portable to every POSIX system.
"""

from __future__ import annotations

import os
import threading

__all__ = ["watch_parent", "PARENT_POLL_INTERVAL_S"]

#: How often a worker checks that its parent is alive, s (a getppid call: microseconds).
PARENT_POLL_INTERVAL_S = 0.25


def _watch(parent_pid: int, interval_s: float) -> None:
    stop = threading.Event()
    while not stop.wait(interval_s):
        if os.getppid() != parent_pid:
            # No cleanup: the work belongs to a server that no longer exists, and exit
            # handlers could block on the dead parent's queues.
            os._exit(0)


def watch_parent(parent_pid: int, interval_s: float = PARENT_POLL_INTERVAL_S) -> None:
    """Start a daemon thread that ends this process once ``parent_pid`` is no longer its parent.

    Call it in the child (a pool ``initializer``) with the parent's pid taken in the parent.
    Returns at once; if the parent is already gone, ends the process immediately.
    """
    if os.getppid() != parent_pid:
        os._exit(0)
    threading.Thread(target=_watch, args=(int(parent_pid), float(interval_s)), name="penumbra-parent-watch",
                     daemon=True).start()
