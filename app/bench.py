"""How long the desktop app's GUI thread stalls: ``python -m app.bench``.

A 10 ms ``QTimer`` heartbeat runs in the GUI thread while the app does what a
technician does: open a demo spectrum with its recipe, fit it, receive the
result, open each result tab, switch the x axis, edit a parameter (the result
goes out of date) and undo. For every step the longest gap between two beats
is the longest time the window could not react to a click or repaint. The
target is 0.2 s per step (a delay users notice as a stall; common practice
in interface design).

Two references are measured in the same run: the longest gap of an *empty*
event loop (what the machine's scheduling alone costs), and the median time to
draw a fixed two-panel matplotlib figure of 800 points at the plot's size (the
machine's drawing speed right now). On a loaded machine every number grows; the
ratio to the drawing reference shows what the app adds beyond one ordinary draw.

Runs offscreen (``QT_QPA_PLATFORM=offscreen``) unless a display is set.
``--out FILE`` writes the numbers as JSON. ``python -m fitting.bench`` measures
the science core; this script is its GUI counterpart (``fitting`` never imports Qt).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

__all__ = ["main", "run", "TARGET_S"]

#: Longest acceptable GUI-thread stall per user step, seconds.
TARGET_S = 0.2
ROOT = Path(__file__).resolve().parents[1]
SPECTRUM = ROOT / "demo_data" / "spectra" / "PL2-T-0101.csv"
RECIPE = ROOT / "demo_data" / "recipe.json"


class _Heartbeat:
    def __init__(self, interval_ms: int = 10):
        from PySide6.QtCore import QTimer
        self.beats: list[float] = []
        self.timer = QTimer()
        self.timer.setInterval(interval_ms)
        self.timer.timeout.connect(lambda: self.beats.append(time.perf_counter()))
        self.timer.start()

    def longest_gap(self, t0: float, t1: float) -> float:
        """Longest interval between beats (and the ends) within [t0, t1]."""
        inside = [t for t in self.beats if t0 <= t <= t1]
        marks = [t0, *inside, t1]
        return max(b - a for a, b in zip(marks, marks[1:]))


def _spin(seconds: float, until=None) -> bool:
    """Run the event loop for ``seconds`` or until ``until()`` is true (checked every 2 ms).

    A ``QEventLoop`` runs the events, not ``QApplication.processEvents()`` in a Python
    loop: PySide6 6.12 releases one reference to ``None`` per ``processEvents()`` call
    from Python, and thousands of calls crash the interpreter.
    """
    from PySide6.QtCore import QEventLoop, QTimer
    loop = QEventLoop()
    done = [until is None]
    check = QTimer()
    if until is not None:
        def poll():
            if until():
                done[0] = True
                loop.quit()
        check.setInterval(2)
        check.timeout.connect(poll)
        check.start()
    QTimer.singleShot(int(seconds * 1000), loop.quit)
    loop.exec()
    check.stop()
    return done[0]


def _step(app, beat, action, settle_s: float = 0.8, until=None, timeout_s: float = 120.0):
    """Run ``action`` from the event loop, wait (for ``until``), return the longest gap.

    With ``until``, returns two gaps: while waiting for it, and after it (settling).
    """
    from PySide6.QtCore import QTimer
    _spin(0.15)                          # start from a quiet loop
    t0 = time.perf_counter()
    QTimer.singleShot(0, action)
    t_mid = None
    if until is not None:
        if not _spin(timeout_s, until):
            raise TimeoutError("the app did not reach the expected state in time")
        t_mid = time.perf_counter()
    _spin(settle_s)
    t1 = time.perf_counter()
    if t_mid is None:
        return beat.longest_gap(t0, t1)
    return beat.longest_gap(t0, t_mid), beat.longest_gap(t_mid, t1)


def _reference_draw_s(width_px: int = 540, height_px: int = 780, repeat: int = 5) -> float:
    """Median time of one draw of a fixed two-panel figure (a machine-speed yardstick)."""
    import numpy as np
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    fig = Figure(figsize=(width_px / 100, height_px / 100), dpi=100)
    canvas = FigureCanvasAgg(fig)
    ax, axr = fig.subplots(2, 1, sharex=True, height_ratios=(3, 1))
    x = np.linspace(300, 1100, 801)
    ax.plot(x, 50 + 30 * np.sin(x / 40))
    ax.plot(x, 50 + 29 * np.sin(x / 40))
    axr.plot(x, np.sin(x / 7))
    ax.set_title("reference")
    ax.legend(["a", "b"])
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        canvas.draw()
        times.append(time.perf_counter() - t0)
    return sorted(times)[len(times) // 2]


def run() -> dict:
    """Measure every step; returns ``{"reference_s": .., "steps": [{"step", "gap_s"}]}``."""
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from PySide6.QtCore import QSettings
    from PySide6.QtWidgets import QApplication, QMessageBox

    QMessageBox.exec = lambda self: 0          # never block on a box
    app = QApplication.instance() or QApplication(["pellucid-bench"])
    from .window import MainWindow
    tmp = Path(tempfile.mkdtemp(prefix="pellucid-bench-"))
    win = MainWindow(QSettings(str(tmp / "s.ini"), QSettings.IniFormat))
    win.resize(1400, 900)
    win.show()
    beat = _Heartbeat()
    _spin(0.5)
    steps = []
    t0 = time.perf_counter()
    _spin(1.0)
    reference = beat.longest_gap(t0, time.perf_counter())
    reference_draw = _reference_draw_s()

    def record(name, action, **kw):
        steps.append({"step": name, "gap_s": _step(app, beat, action, **kw)})

    win.settings.setValue("show_import_preview", False)
    record("load recipe", lambda: win.load_recipe(RECIPE))
    record("open demo spectrum", lambda: win.open_spectrum(SPECTRUM))
    done = []
    # The result is handled when the job's 'done' arrives; its redraws follow on timers.
    running, arrived = _step(app, beat, lambda: (
        win.start_fit(), win.fit_job.done.connect(lambda: done.append(1))),
        until=lambda: bool(done))
    steps += [{"step": "fit running", "gap_s": running},
              {"step": "result arrives", "gap_s": arrived}]
    res = win.results
    for tab in (res.optical_tab, res.tauc_tab, res.corr_tab, res.report, res.widget(0)):
        record(f"open tab {res.tabText(res.indexOf(tab))}",
               lambda t=tab: res.setCurrentWidget(t))
    record("open tab n κ α again (cached)", lambda: res.setCurrentWidget(res.optical_tab))
    record("x axis: photon energy", lambda: win.plot.set_axis("eV"))
    record("x axis: wavelength", lambda: win.plot.set_axis("nm"))
    model = win.stack_panel.table_model
    record("edit a parameter", lambda: model.setData(model.index(0, 1), "600"))
    record("undo", win.act_undo.trigger)
    _spin(0.5)
    win.shutdown_jobs()
    if hasattr(win.session, "mark_saved"):
        win.session.mark_saved()
    win.close()
    beat.timer.stop()
    # Tear the window down while the application still runs (not at interpreter exit,
    # where Python and Qt would destroy objects in no safe order).
    beat.timer.deleteLater()
    win.deleteLater()
    _spin(0.2)
    return {"reference_s": reference, "reference_draw_s": reference_draw,
            "target_s": TARGET_S, "steps": steps}


def format_report(res: dict) -> str:
    ref, draw = res["reference_s"], res["reference_draw_s"]
    lines = ["Longest GUI-thread stall per step (heartbeat every 10 ms)",
             f"reference 1: empty event loop, longest gap {ref * 1000:.0f} ms",
             f"reference 2: one draw of a fixed two-panel figure, {draw * 1000:.0f} ms", "",
             f"{'step':<34s} {'stall':>8s} {'× draw':>7s}  target {res['target_s']:.1f} s"]
    for s in res["steps"]:
        g = s["gap_s"]
        mark = "ok" if g < res["target_s"] else "SLOW"
        lines.append(f"{s['step']:<34s} {g * 1000:6.0f} ms {g / max(draw, 1e-3):6.1f}  {mark}")
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", help="write the numbers as JSON to this file")
    args = parser.parse_args(argv)
    res = run()
    print(format_report(res))
    if args.out:
        Path(args.out).write_text(json.dumps(res, indent=2) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
