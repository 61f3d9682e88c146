"""Worker processes for the batch runner that never outlive the batch.

:class:`WorkerPool` is a :class:`concurrent.futures.ProcessPoolExecutor` with
three additions an unattended batch needs:

* **Set up once per worker.** ``initializer(context)`` runs once in each
  worker: imports, the recipe(s), the reference spectra. Tasks then carry only
  what differs per spectrum.
* **Workers die with their parent.** Each worker starts a daemon thread that
  blocks on :func:`multiprocessing.parent_process`'s sentinel, a pipe end only
  the parent holds; when the parent exits for any reason (SIGTERM, SIGKILL, a
  crash, a closed terminal) the read returns and the worker ends at once
  (``os._exit``). Without this, workers stuck in a fit keep running and writing
  after the batch was stopped, and hold the caller's stdout open so wrapper
  scripts hang. A worker ignores SIGINT: Ctrl-C is the parent's decision.
* **Stop now.** :meth:`WorkerPool.terminate` ends the workers immediately (the
  parent's Ctrl-C or SIGTERM); what they were writing is a temporary file that
  the atomic writes never rename into place.

Workers start with the ``forkserver`` method where the OS has it (POSIX) and
``spawn`` elsewhere: both start from a clean process, never ``fork()`` a
process that may run GUI or BLAS threads. The fork server imports the modules
in ``preload`` once, so every worker starts warm; :func:`start_early` starts it
before the caller's own set-up (reading the recipe, hashing the inputs), so its
imports run on another core meanwhile instead of after.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import threading
from concurrent.futures import ProcessPoolExecutor

__all__ = ["WorkerPool", "mp_context", "exit_with_parent", "start_early",
           "start_workers_early", "BATCH_PRELOAD"]

#: What a batch worker needs loaded: the fork server imports these once, so each
#: worker starts with the fit engine, the reader and the exports in place.
BATCH_PRELOAD = ("fitting.batch", "fitting.fit", "fitting.reader", "fitting.export")

#: Exit status of a worker that ended because its parent was gone.
ORPHAN_EXIT = 75


def mp_context(preload=()):
    """'forkserver' (with ``preload`` imported once in the server) where available,
    else 'spawn'."""
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        if preload:
            ctx.set_forkserver_preload(list(preload))
        return ctx
    return multiprocessing.get_context("spawn")


def start_early(preload=()) -> bool:
    """Start the fork server now, with ``preload`` imported in it, and return at once.

    A :class:`WorkerPool` made later with the same ``preload`` uses this server, so
    its workers start warm without waiting for the imports. Returns False where
    there is no fork server (``spawn``: nothing to start ahead).
    """
    ctx = mp_context(preload)
    if ctx.get_start_method() != "forkserver":
        return False
    from multiprocessing import forkserver
    try:
        forkserver.ensure_running()
    except (OSError, ValueError):
        return False                  # the pool tries again (and reports) when it starts
    return True


def start_workers_early(jobs: int | None = None) -> bool:
    """Start loading the batch workers' modules now, if a batch of ``jobs`` will use them.

    The fork server imports the fit engine (~1.5 s of CPU) on another core while
    the caller reads the recipe and hashes the inputs; without this the two happen
    one after the other. Nothing happens for ``jobs=1``, on one core, or where the
    server already runs.
    """
    if (jobs or os.cpu_count() or 1) < 2:
        return False
    return start_early(BATCH_PRELOAD)


def _watch_parent(sentinel) -> None:
    from multiprocessing.connection import wait
    try:
        wait([sentinel])
    except (OSError, ValueError):
        pass
    os._exit(ORPHAN_EXIT)          # no cleanup: the parent that wanted the result is gone


def exit_with_parent() -> bool:
    """In a worker process: end this process as soon as its parent exits.

    Returns False where the parent cannot be watched (not a multiprocessing child).
    """
    parent = multiprocessing.parent_process()
    sentinel = getattr(parent, "sentinel", None)
    if sentinel is None:
        return False
    threading.Thread(target=_watch_parent, args=(sentinel,), name="parent-watch",
                     daemon=True).start()
    return True


def _worker_start(initializer, initargs):
    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)
    except (ValueError, OSError):
        pass
    exit_with_parent()
    if initializer is not None:
        initializer(*initargs)


class WorkerPool(ProcessPoolExecutor):
    """A process pool whose workers set up once, die with the parent and can be ended now.

    Parameters
    ----------
    jobs : int
        Number of worker processes.
    initializer, initargs
        Called once in each worker, after the parent watch is in place.
    preload : sequence of str
        Modules the fork server imports once (POSIX).
    """

    def __init__(self, jobs: int, *, initializer=None, initargs=(), preload=()):
        super().__init__(max_workers=jobs, mp_context=mp_context(preload),
                         initializer=_worker_start, initargs=(initializer, tuple(initargs)))

    def worker_pids(self) -> list[int]:
        """Process ids of the live workers (for tests and diagnostics)."""
        procs = getattr(self, "_processes", None) or {}
        return [p.pid for p in list(procs.values()) if p.is_alive()]

    def terminate(self) -> None:
        """End every worker now (SIGTERM, then SIGKILL for any that lingers) and shut down."""
        if hasattr(self, "terminate_workers"):            # Python 3.14+
            try:
                self.terminate_workers()
                return
            except Exception:                             # noqa: BLE001 - fall back below
                pass
        procs = list((getattr(self, "_processes", None) or {}).values())
        for p in procs:
            try:
                p.terminate()
            except (OSError, AttributeError, ValueError):
                pass
        for p in procs:
            try:
                p.join(5)
                if p.is_alive():
                    p.kill()
                    p.join(5)
            except (OSError, AttributeError, ValueError, AssertionError):
                pass
        self.shutdown(wait=False, cancel_futures=True)
