"""Helper processes that end with the process that started them.

quietwell starts two helper processes: the fitting process (a ``ProcessPoolExecutor``
worker, :mod:`quietwell.live._fitter`) and the catalog process
(:mod:`quietwell.store._serve`). If their parent dies without cleaning up (SIGKILL, an
out-of-memory kill, a crash), nothing would tell them, and they would run on with nobody
to serve (and multiprocessing's resource tracker with the fitting process). So each
calls :func:`follow_parent` when it starts:

* a daemon thread waits for the parent to end and then calls ``on_orphan``. On Linux it
  waits on a pidfd of the parent (``os.pidfd_open``: woken the moment the parent exits,
  no polling); where there is none it checks every 0.5 s that the parent still runs.
* optionally the kernel also sends a signal when the parent ends (``prctl``
  ``PR_SET_PDEATHSIG``), which works even while this process's interpreter lock is held
  by a long computation. The kernel sends it when the *thread* that started this process
  ends, not the process (prctl(2), NOTES): a helper started from a short-lived thread
  would be killed while its parent still runs. So it is set only if the child was
  started from the parent's main thread, which ends only with the process;
  :data:`THIS_PROCESS` tells the child which thread started it.
"""

from __future__ import annotations

import os
import select
import signal
import sys
import threading
import time
from collections.abc import Callable
from typing import NamedTuple

__all__ = ["THIS_PROCESS", "Parent", "exit_with_parent", "follow_parent", "worker_init"]

#: Seconds between checks of the parent where no pidfd can be had.
POLL_S = 0.5


class Parent(NamedTuple):
    """The process that started this one, and whether its main thread did."""

    pid: int
    main_thread: bool


class _Starter:
    """Becomes the :class:`Parent` of a child when it is pickled for it.

    multiprocessing pickles a process's arguments in ``Process.start()``, in the thread
    that then forks the child, so the child learns the pid and the thread that started
    it, whichever thread of the parent that was (for a ``ProcessPoolExecutor``, the one
    that submitted the first task).
    """

    def __reduce__(self):
        return (Parent, (os.getpid(), threading.current_thread() is threading.main_thread()))

    def __repr__(self) -> str:
        return "THIS_PROCESS"


#: Pass this to a child process (e.g. in ``initargs``); the child receives a :class:`Parent`.
THIS_PROCESS = _Starter()


def follow_parent(parent: Parent | int, on_orphan: Callable[[], None], *,
                  kill_signal: int | None = None) -> None:
    """Call ``on_orphan()`` (in a daemon thread) as soon as the parent process has ended.

    Parameters
    ----------
    parent : Parent or int
        The process that started this one (a pid: started from a thread not known to
        be its main thread). If it has already ended, ``on_orphan`` is called at once.
    on_orphan : callable
        Called once, from the watching thread; it may end the process (``os._exit``).
    kill_signal : int, optional
        Also ask the kernel to send this signal when the parent ends, if the parent's
        main thread started this process (see the module notes; Linux only).
    """
    if isinstance(parent, int):
        parent = Parent(parent, False)
    if kill_signal is not None and parent.main_thread:
        _set_death_signal(parent.pid, kill_signal)
    threading.Thread(target=_watch, args=(parent.pid, on_orphan), name="quietwell-lifeline",
                     daemon=True).start()


def exit_with_parent(parent: Parent) -> None:
    """Initializer of a ``ProcessPoolExecutor`` worker: end it at once when its parent ends.

    Use with ``initargs=(THIS_PROCESS,)``. The worker imports an initializer's module
    before it runs it; this one imports nothing heavy, so the watch starts a fraction of
    a second after the worker does rather than after the imports of the work it will do.
    """
    follow_parent(parent, _exit_now, kill_signal=signal.SIGKILL)


def worker_init(parent: Parent) -> None:
    """Initializer of quietwell's worker processes: end with the parent, and leave the
    process group's SIGINT and SIGTERM to the parent (Ctrl-C in a terminal, a service
    manager's stop and ``timeout`` signal the whole group; the parent ends the run and
    shuts the worker down, so the worker must not die first)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    exit_with_parent(parent)


def _exit_now() -> None:
    os._exit(1)


def _set_death_signal(parent_pid: int, sig: int) -> bool:
    if not sys.platform.startswith("linux") or os.getppid() != parent_pid:
        return False  # not its direct child (a wrapper between them), or already gone
    import ctypes

    try:
        libc = ctypes.CDLL(None, use_errno=True)
        if libc.prctl(1, int(sig), 0, 0, 0) != 0:  # 1 = PR_SET_PDEATHSIG
            return False
    except (OSError, AttributeError):
        return False
    if os.getppid() != parent_pid:  # the parent ended before the request: act for it
        os.kill(os.getpid(), sig)
    return True


def _watch(parent_pid: int, on_orphan: Callable[[], None]) -> None:
    ppid0 = os.getppid()
    try:
        pidfd = os.pidfd_open(parent_pid)
    except ProcessLookupError:
        on_orphan()
        return
    except (AttributeError, OSError):  # no pidfd here (old kernel, seccomp, not Linux)
        pidfd = None
    if pidfd is not None:
        # Readable once the process has ended. (If the parent had ended and its pid
        # been reused before pidfd_open, this watches the wrong process: that needs
        # the pid counter to wrap within this process's start-up, and getppid below
        # rules it out whenever this process is the parent's direct child.)
        if ppid0 == parent_pid and os.getppid() != parent_pid:
            on_orphan()
            return
        waiter = select.poll()
        waiter.register(pidfd, select.POLLIN)
        while not waiter.poll():
            pass
        on_orphan()
        return
    while os.getppid() == ppid0 and _alive(parent_pid):
        time.sleep(POLL_S)
    on_orphan()


def _alive(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat", "rb") as f:
            state = f.read().rpartition(b")")[2].split()[0]
        return state not in (b"Z", b"X")  # a killed parent not yet reaped is a zombie
    except FileNotFoundError:
        return False
    except OSError:
        pass
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass
    return True
