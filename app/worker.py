"""The one module of the app that touches threads.

A :class:`Job` runs a function from ``fitting`` (a fit, a batch generator) on a
:class:`QThread` and reports back through Qt signals, which Qt delivers in the
GUI thread (queued connections), so no panel ever sees a thread. Cancel is
cooperative: :meth:`Job.cancel` sets a :class:`threading.Event` that the
fitting code checks between evaluations or between spectra (the pattern of
napari's ``thread_worker`` and lmfit's ``iter_cb`` abort).

Progress reports can come thousands of times per second from a fit; they are
throttled here to one signal per ``interval_s`` (the latest one wins) so the
event loop is never flooded and the window stays responsive.
"""

from __future__ import annotations

import threading
import time
import traceback

from PySide6.QtCore import QObject, QThread, Signal

__all__ = ["Job"]


class _Thread(QThread):
    def __init__(self, job: "Job"):
        super().__init__()
        self._job = job

    def run(self):  # executed in the worker thread
        self._job._run()


class Job(QObject):
    """Run ``target(stop, report)`` in a worker thread.

    Parameters
    ----------
    target : callable
        Called as ``target(stop, report)`` where ``stop`` is a
        :class:`threading.Event` and ``report(obj)`` sends a progress object to
        the GUI. If it returns an iterator (a generator), each item it yields is
        sent as :attr:`stepped` (never throttled) and the job succeeds with the
        generator's return value.
    interval_s : float
        Minimum time between two :attr:`progress` signals.

    Signals
    -------
    progress(object) : latest progress report (throttled)
    stepped(object) : one item yielded by a generator target
    succeeded(object) : the target's return value
    failed(object) : the exception it raised (with ``__traceback_text__`` set)
    done() : always emitted last, after succeeded or failed
    """

    progress = Signal(object)
    stepped = Signal(object)
    succeeded = Signal(object)
    failed = Signal(object)
    done = Signal()

    def __init__(self, target, *, interval_s: float = 0.05, parent=None):
        super().__init__(parent)
        self._target = target
        self._interval = interval_s
        self._last = 0.0
        self.stop = threading.Event()
        self._thread = _Thread(self)
        self._thread.finished.connect(self._on_thread_finished)
        self._outcome = None

    # -- GUI thread ---------------------------------------------------------------------
    def start(self) -> None:
        self._thread.start()

    def cancel(self) -> None:
        """Ask the work to stop at its next check (returns at once)."""
        self.stop.set()

    def is_running(self) -> bool:
        return self._thread.isRunning()

    def wait(self, ms: int = 30000) -> bool:
        """Block until the thread ends (for shutdown and tests)."""
        return self._thread.wait(ms)

    def _on_thread_finished(self):
        kind, value = self._outcome or ("failed", RuntimeError("worker ended without a result"))
        if kind == "ok":
            self.succeeded.emit(value)
        else:
            self.failed.emit(value)
        self.done.emit()

    # -- worker thread ------------------------------------------------------------------
    def _report(self, obj) -> None:
        now = time.monotonic()
        if now - self._last >= self._interval:
            self._last = now
            self.progress.emit(obj)

    def _run(self) -> None:
        try:
            out = self._target(self.stop, self._report)
            if hasattr(out, "__next__"):
                gen, out = out, None
                while True:
                    try:
                        item = next(gen)
                    except StopIteration as stop:
                        out = stop.value        # a generator's return value
                        break
                    self.stepped.emit(item)
            self._outcome = ("ok", out)
        except BaseException as exc:  # noqa: BLE001 - every failure must reach the GUI
            exc.__traceback_text__ = traceback.format_exc()
            self._outcome = ("failed", exc)
