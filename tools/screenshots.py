"""Render screenshots of the desktop app's main states to ``docs/screenshots/`` offscreen.

    python tools/screenshots.py [--out docs/screenshots] [--theme light]

States: ``empty`` (just started), ``loaded`` (a demo spectrum with its recipe and a
masked window, the live model curve), ``fitted`` (after Fit: summary), ``optical``
(n, κ, α tab), ``tauc`` (Tauc tab), ``correlation`` (heat map), ``batch`` (batch dialog after a small run),
``import`` (the import preview) and ``dark`` (fitted, dark theme). Uses the
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
    from PySide6.QtCore import QEventLoop, QTimer
    loop = QEventLoop()
    QTimer.singleShot(qtbot_ms, loop.quit)
    loop.exec()
    app.processEvents()


def _wait(app, cond, timeout_s: float = 120.0):
    import time
    t0 = time.monotonic()
    while not cond():
        if time.monotonic() - t0 > timeout_s:
            raise TimeoutError("the app did not reach the expected state in time")
        _settle(app, 50)


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
        written.append(_save(win, out / "fitted.png"))
        for name, tab in (("optical", win.results.optical_tab),
                          ("tauc", win.results.tauc_tab),
                          ("correlation", win.results.corr_tab)):
            win.results.setCurrentWidget(tab)
            _settle(app, 600)
            written.append(_save(win, out / f"{name}.png"))
        win.results.setCurrentIndex(0)

        from app.import_dialog import ImportDialog
        dlg = ImportDialog(ROOT / "demo_data" / "spectra" / "PL2-T-0102.csv", parent=win)
        dlg.show()
        _settle(app, 300)
        written.append(_save(dlg, out / "import.png"))
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
        written.append(_save(win, out / "dark.png"))
        win.shutdown_jobs()
        win.close()
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    for p in written:
        print(f"{p}  {p.stat().st_size / 1024:.0f} kB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
