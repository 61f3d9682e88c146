"""Render screenshots of the desktop app's main states to ``docs/screenshots/`` offscreen.

    python tools/screenshots.py [--out docs/screenshots] [--theme light]

States: ``empty`` (just started), ``loaded`` (a demo spectrum with its recipe and a
masked window, the live model curve), ``fitted`` (after Fit: summary), ``optical``
(n, κ, α tab), ``tauc`` (Tauc tab), ``correlation`` (heat map), ``stale`` (the model
changed after the fit: the result is marked out of date), ``export`` (the export
dialog), ``batch`` (batch dialog after a small run), ``import`` (the import preview),
``counts`` (the preview of raw detector counts, asking for the 100 % line) and
``dark`` (fitted, dark theme). Uses the
synthetic spectra in ``demo_data/`` (invented scenario). Each PNG is written with
an adaptive palette if Pillow is installed, so it stays well below 300 kB.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

SIZE = (1400, 900)
SPECTRUM = ROOT / "demo_data" / "spectra" / "PL2-T-0101.csv"
RECIPE = ROOT / "demo_data" / "recipe.json"


def _save(widget, path: Path) -> Path:
    img = widget.grab()
    img.save(str(path), "PNG")
    try:
        from PIL import Image
    except ImportError:
        return path
    with Image.open(path) as im:
        small = im.convert("RGB").quantize(colors=256, method=Image.Quantize.MEDIANCUT,
                                           dither=Image.Dither.NONE)
        small.save(path, optimize=True)
    return path


def _settle(app, qtbot_ms: int = 200):
    """Let the event loop run for a while (a QEventLoop: PySide6 6.12 mishandles
    ``processEvents()`` called from Python many times)."""
    from PySide6.QtCore import QEventLoop, QTimer
    loop = QEventLoop()
    QTimer.singleShot(qtbot_ms, loop.quit)
    loop.exec()


def _wait(app, cond, timeout_s: float = 120.0):
    import time
    t0 = time.monotonic()
    while not cond():
        if time.monotonic() - t0 > timeout_s:
            raise TimeoutError("the app did not reach the expected state in time")
        _settle(app, 50)


def _drawn(win):
    """True when the plot and the result tab on show are drawn."""
    tab = win.results.currentWidget()
    return not win.plot.pending and not getattr(tab, "busy", False)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=str(ROOT / "docs" / "screenshots"))
    parser.add_argument("--theme", default="light", choices=("light", "dark", "system"))
    args = parser.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)

    from PySide6.QtCore import QSettings
    from PySide6.QtWidgets import QApplication, QMessageBox

    from app.theme import apply_theme
    from app.window import MainWindow

    # Never block on a message box while rendering; print it instead.
    QMessageBox.exec = lambda self: print(f"[dialog] {self.windowTitle()}: {self.text()}") or 0

    app = QApplication.instance() or QApplication(["pellucid-screenshots"])
    apply_theme(app, args.theme)
    tmp = Path(tempfile.mkdtemp(prefix="pellucid-shots-"))
    written = []
    try:
        settings = QSettings(str(tmp / "settings.ini"), QSettings.IniFormat)
        win = MainWindow(settings)
        win.resize(*SIZE)
        win.show()
        _settle(app, 400)
        written.append(_save(win, out / "empty.png"))

        win.load_recipe(RECIPE)
        win.open_spectrum(SPECTRUM)
        win.session.undo.setClean()
        _settle(app, 600)
        written.append(_save(win, out / "loaded.png"))

        win.start_fit()
        _wait(app, lambda: win.fit_job is not None and not win.fit_job.is_running()
              and win.session.result is not None)
        _settle(app, 600)
        _wait(app, lambda: _drawn(win))
        written.append(_save(win, out / "fitted.png"))
        for name, tab in (("optical", win.results.optical_tab),
                          ("tauc", win.results.tauc_tab),
                          ("correlation", win.results.corr_tab)):
            win.results.setCurrentWidget(tab)
            _settle(app, 300)
            _wait(app, lambda t=tab: t.figure is not None and not t.busy)
            _settle(app, 300)
            written.append(_save(win, out / f"{name}.png"))
        win.results.setCurrentIndex(0)

        # The technician tries another model: the result says it is out of date.
        win.session.set_layer_model(0, "cauchy")
        _settle(app, 400)
        _wait(app, lambda: _drawn(win))
        written.append(_save(win, out / "stale.png"))
        win.act_undo.trigger()
        _settle(app, 400)

        from app.export_dialog import ExportDialog
        dlg = ExportDialog(str(tmp / "exports"), settings, win)
        dlg.show()
        _settle(app, 300)
        written.append(_save(dlg, out / "export.png"))
        dlg.close()

        from app.import_dialog import ImportDialog
        dlg = ImportDialog(ROOT / "demo_data" / "spectra" / "PL2-T-0102.csv", parent=win)
        dlg.show()
        _settle(app, 300)
        written.append(_save(dlg, out / "import.png"))
        dlg.close()
        refs = ROOT / "demo_data" / "references"
        dlg = ImportDialog(refs / "PL2-T-0115_raw_counts.txt", parent=win)
        dlg.show()
        _settle(app, 300)
        written.append(_save(dlg, out / "counts.png"))
        dlg.close()

        spectra = tmp / "spectra"
        spectra.mkdir()
        for p in sorted((ROOT / "demo_data" / "spectra").iterdir())[:5]:
            shutil.copy(p, spectra / p.name)
        batch = win.batch()
        batch.input_edit.setText(str(spectra))
        batch.output_edit.setText(str(tmp / "results"))
        batch.jobs.setValue(1)
        batch.start()
        _wait(app, lambda: not batch.is_running(), 300)
        _settle(app, 300)
        written.append(_save(batch, out / "batch.png"))
        batch.close()

        apply_theme(app, "dark")
        win.set_theme("dark")
        _settle(app, 600)
        _wait(app, lambda: _drawn(win))
        written.append(_save(win, out / "dark.png"))
        win.shutdown_jobs()
        win.session.mark_saved()
        win.close()
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    for p in written:
        print(f"{p}  {p.stat().st_size / 1024:.0f} kB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
