"""Import preview, reference correction, error dialogs, drag and drop and the entry point."""

import sys
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("PySide6")
from PySide6.QtCore import QMimeData, QPointF, Qt, QUrl  # noqa: E402
from PySide6.QtGui import QDropEvent  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
REFS = ROOT / "demo_data" / "references"


def _bare_table(path):
    """Two unlabelled columns: the reader cannot know whether they hold T or R."""
    wl = np.linspace(400, 900, 200)
    y = 0.5 + 0.3 * np.sin(wl / 40)
    path.write_text("\n".join(f"{a:.1f}\t{b:.5f}" for a, b in zip(wl, y)) + "\n")
    return path


def test_import_dialog_shows_lines_detection_and_applies_corrections(qtbot, tmp_path,
                                                                     demo_csv):
    from app.import_dialog import ImportDialog
    dlg = ImportDialog(demo_csv)
    qtbot.addWidget(dlg)
    assert "Wavelength (nm)" in dlg.lines.toPlainText()
    assert "Detected:" in dlg.detected.text() and "nm" in dlg.detected.text()
    assert dlg.spectrum is not None and "400 points" in dlg.result_label.text()
    # A correction that contradicts the file's own column name is refused with the reason.
    dlg.y_kind.setCurrentIndex(dlg.y_kind.findData("R_percent"))
    assert dlg.spectrum is None
    assert "reflectance" in dlg.detected.text() + dlg.result_label.text()
    # An unlabelled table: the user says the values are reflectance (fraction).
    dlg = ImportDialog(_bare_table(tmp_path / "bare.txt"))
    qtbot.addWidget(dlg)
    assert dlg.spectrum is not None and dlg.spectrum.quantity == "T"
    dlg.y_kind.setCurrentIndex(dlg.y_kind.findData("R_fraction"))
    assert dlg.options().y_kind == "R_fraction"
    assert dlg.spectrum.quantity == "R"
    # An impossible correction is refused in the dialog, Load is disabled.
    dlg.x_column.setValue(2)
    dlg.y_column.setValue(2)
    assert dlg.spectrum is None
    assert not dlg.buttons.button(dlg.buttons.StandardButton.Ok).isEnabled()


def test_open_with_preview_uses_the_corrected_options(window, monkeypatch, tmp_path, qtbot):
    from app.import_dialog import ImportDialog

    def accept(self):
        self.y_kind.setCurrentIndex(self.y_kind.findData("R_fraction"))
        self.every_time.setChecked(False)
        return ImportDialog.Accepted

    monkeypatch.setattr(ImportDialog, "exec", accept)
    assert window.open_spectrum(_bare_table(tmp_path / "bare.txt"), ask=True)
    assert window.session.spectrum.quantity == "R"
    assert window.session.reader_options.y_kind == "R_fraction"
    assert not window._preview_every_time()          # remembered in settings
    qtbot.waitUntil(lambda: not window.plot.pending)
    assert "Reflectance" in window.plot.ax.get_ylabel()


def test_reference_correction_of_demo_counts():
    from app.reference_dialog import corrected_spectrum
    s = corrected_spectrum(REFS / "PL2-T-0115_raw_counts.txt", REFS / "baseline_100pct.txt",
                           REFS / "dark.txt")
    # T = (S - D) / (B - D) of a film on glass: about 0 (noise) in the UV edge, below 1
    # everywhere, high in the transparent range (demo data, invented scenario).
    assert len(s) > 100 and s.values.min() > -0.01 and s.values.max() < 1.0
    assert np.median(s.values[s.wavelength_nm > 600]) > 0.6


def test_reference_dialog_in_the_window(window, monkeypatch):
    from app.import_dialog import ImportDialog
    from app.reference_dialog import ReferenceDialog
    from fitting.reader import ReaderOptions
    # A T file that is really a raw signal: the reference dialog ratios it (read as counts).
    monkeypatch.setattr(ImportDialog, "exec", lambda self: ImportDialog.Rejected)
    assert window.open_spectrum(REFS / "PL2-T-0115_raw_counts.txt",
                                options=ReaderOptions(y_kind="T_fraction"))
    assert window.session.spectrum.values.max() > 100          # not a transmittance yet

    def accept(self):
        self.baseline.setText(str(REFS / "baseline_100pct.txt"))
        self.dark.setText(str(REFS / "dark.txt"))
        return ReferenceDialog.Accepted

    monkeypatch.setattr(ReferenceDialog, "exec", accept)
    window.reference_correction()
    assert window.session.spectrum.values.max() < 1.0
    assert window.session.reference["baseline"].endswith("baseline_100pct.txt")
    assert "Reference correction applied" in window.statusBar().currentMessage()
    assert "Reference-corrected" in window.spectrum_panel.info.text()


def test_reference_dialog_refuses_mismatched_files(window, monkeypatch, dialogs, demo_csv):
    from app.reference_dialog import ReferenceDialog
    window.open_spectrum(demo_csv)
    before = window.session.spectrum

    def accept(self):
        self.baseline.setText(str(demo_csv.parent / "nothing.txt"))
        return ReferenceDialog.Accepted

    monkeypatch.setattr(ReferenceDialog, "exec", accept)
    window.reference_correction()
    assert window.session.spectrum is before
    assert dialogs and dialogs[-1]["title"] == "Reference correction not applied"


def test_drop_a_file_opens_it(window, demo_csv, monkeypatch):
    monkeypatch.setattr(window, "_preview_every_time", lambda: False)
    mime = QMimeData()
    mime.setUrls([QUrl.fromLocalFile(str(demo_csv))])
    ev = QDropEvent(QPointF(100, 100), Qt.CopyAction, mime, Qt.LeftButton, Qt.NoModifier)
    window.dropEvent(ev)
    assert window.session.spectrum is not None


def test_excepthook_shows_a_dialog(window, dialogs, monkeypatch):
    from app.main import install_excepthook
    monkeypatch.setattr(sys, "excepthook", sys.excepthook)
    hook = install_excepthook(lambda: window)
    try:
        raise ZeroDivisionError("boom")
    except ZeroDivisionError:
        hook(*sys.exc_info())
    assert dialogs[-1]["title"] == "Unexpected problem"
    assert "boom" in dialogs[-1]["text"] and "fault in Pellucid" in dialogs[-1]["info"]


def test_main_starts_and_opens_a_spectrum(qtbot, tmp_path, demo_csv, monkeypatch):
    from PySide6.QtWidgets import QApplication
    import app.main as app_main
    seen = {}

    def fake_exec():
        wins = [w for w in QApplication.topLevelWidgets() if type(w).__name__ == "MainWindow"
                and w.isVisible()]
        seen["spectrum"] = wins[-1].session.spectrum
        for w in wins:
            w.close()
        return 0

    monkeypatch.setattr(QApplication, "exec", staticmethod(fake_exec))
    monkeypatch.setattr(sys, "excepthook", sys.excepthook)
    ini = tmp_path / "s.ini"
    from PySide6.QtCore import QSettings
    QSettings(str(ini), QSettings.IniFormat).setValue("show_import_preview", False)
    assert app_main.main(["--settings", str(ini), "--theme", "light", str(demo_csv)]) == 0
    assert seen["spectrum"] is not None and len(seen["spectrum"]) == 400
    assert ini.read_text().count("geometry") >= 1        # window state saved on close
