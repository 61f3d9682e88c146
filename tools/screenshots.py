"""Render screenshots of the desktop app's main states to ``docs/screenshots/`` offscreen.

    python tools/screenshots.py [--out docs/screenshots] [--theme light]

States: ``empty`` (just started), ``loaded`` (a demo spectrum with its recipe and a
masked window, the live model curve), ``fitted`` (after Fit: summary), ``optical``
(n, κ, α tab), ``tauc`` (Tauc tab), ``correlation`` (heat map), ``stale`` (the model
changed after the fit: the result is marked out of date), ``export`` (the export
dialog), ``batch`` (batch dialog after a small run), ``import`` (the import preview),
``counts`` (the preview of raw detector counts, asking for the 100 % line),
``suggest`` (a technician's Cauchy guess on the absorbing demo film, then "Suggest a
model": the Models tab with the ranking and the offer to use the chosen model),
``known`` (a known layer loaded from an earlier result's n, κ export under the film)
and ``dark`` (fitted, dark theme). Uses the
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


def _known_layer_shot(app, win, tmp: Path, out: Path) -> Path:
    """A clear film fitted over a known barrier loaded from an earlier result's export."""
    import numpy as np

    from fitting.dispersion import Cauchy
    from fitting.export import export_result, make_provenance
    from fitting.known import known_layer_from_export
    from fitting.reader import write_spectrum
    from fitting.spectrum import Spectrum
    from fitting.stack import Layer, Stack
    from fitting.substrates import library_substrate

    r = win.session.result
    export_result(r, tmp / "week1", stem="PL2-T-0101", provenance=make_provenance(r),
                  parts=("nk", "json"))
    table = tmp / "week1" / "PL2-T-0101_nk_film.csv"
    truth = Stack([Layer("top", Cauchy(1.46, 0.004), 420.0),
                   known_layer_from_export(table, name="barrier")],
                  library_substrate("fused_silica", 1.0))
    wl = np.arange(330.0, 1100.5, 1.0)
    T = truth.transmittance(wl) + np.random.default_rng(7).normal(0.0, 0.002, wl.size)
    path = tmp / "PL2-S-0301.csv"
    write_spectrum(path, Spectrum(wl, T, name="PL2-S-0301"))
    win.open_spectrum(path)
    s = win.session
    s.set_layer_model(0, "cauchy")
    s.rename_layer(0, "top")
    win.stack_panel.layer_list.setCurrentRow(0)
    win.stack_panel.load_known(table)                  # lands above the selected layer
    s.move_layer(0, +1)                                # the barrier lies on the substrate
    s.rename_layer(1, "barrier")
    win.start_fit()
    _wait(app, lambda: win.fit_job is not None and not win.fit_job.is_running(), 300)
    win.stack_panel.layer_list.setCurrentRow(1)
    _settle(app, 600)
    _wait(app, lambda: _drawn(win))
    return _save(win, out / "known.png")


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
        dlg = ImportDialog(ROOT / "demo_data" / "spectra" / "PL2-T-0103.txt", parent=win)
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
        apply_theme(app, args.theme)
        win.set_theme(args.theme)

        # Not sure of the model: the default Cauchy on an absorbing film, then Suggest.
        win.session.set_layer_model(0, "cauchy")
        win.start_suggestion()
        _wait(app, lambda: win.fit_job is not None and not win.fit_job.is_running(), 300)
        _settle(app, 600)
        _wait(app, lambda: _drawn(win))
        written.append(_save(win, out / "suggest.png"))
        win.adopt_suggested_model()
        win.results.setCurrentIndex(0)

        # Last week's titania film is the barrier under a new clear film: its n, κ export
        # becomes a known layer. The two-layer spectrum is invented for the picture
        # (Pellucid's own stack engine, 0.2 % T noise), like the rest of the demo data.
        written.append(_known_layer_shot(app, win, tmp, out))
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
