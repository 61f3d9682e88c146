"""Fixtures of the GUI tests: a main window on a throw-away settings file, demo spectra,
and a recorder that replaces blocking message boxes."""

import numpy as np
import pytest

pytest.importorskip("PySide6")
pytest.importorskip("pytestqt")


def synthetic_spectrum(path, *, thickness_nm=650.0, A=2.0, B=0.02, points=400, noise=0.002,
                       seed=1):
    """Write a T spectrum of a Cauchy film on fused silica (invented demo data) and return
    the path. The model is the project's own stack engine, checked against tmm elsewhere."""
    from fitting.dispersion import Cauchy
    from fitting.reader import write_spectrum
    from fitting.spectrum import Spectrum
    from fitting.stack import Layer, Stack
    from fitting.substrates import library_substrate

    st = Stack([Layer("film", Cauchy(A, B), thickness_nm)], library_substrate("fused_silica"))
    wl = np.linspace(350, 1100, points)
    T = st.transmittance(wl) + np.random.default_rng(seed).normal(0, noise, wl.size)
    write_spectrum(path, Spectrum(wl, T))
    return path


@pytest.fixture
def demo_csv(tmp_path):
    return synthetic_spectrum(tmp_path / "demo_film.csv")


@pytest.fixture(autouse=True)
def no_unexpected_modal(monkeypatch):
    """A modal dialog no test answers would wait forever: fail at once and name it.

    Tests that expect a dialog patch its ``exec`` (or use ``dialogs`` for message
    boxes), which overrides this guard.
    """
    from PySide6.QtWidgets import QDialog, QFileDialog, QMessageBox

    def refuse(self):
        raise AssertionError(f"unexpected modal dialog {type(self).__name__}: "
                             f"{self.windowTitle()!r}")

    monkeypatch.setattr(QDialog, "exec", refuse)
    monkeypatch.setattr(QMessageBox, "exec", refuse)
    for name in ("getOpenFileName", "getSaveFileName", "getExistingDirectory"):
        monkeypatch.setattr(QFileDialog, name, staticmethod(
            lambda *a, _n=name, **k: refuse(type("QFileDialog", (), {
                "windowTitle": lambda self: _n})())))


@pytest.fixture
def dialogs(monkeypatch):
    """Record QMessageBox texts instead of blocking; returns the list of records."""
    from PySide6.QtWidgets import QMessageBox
    seen = []

    def fake_exec(self):
        seen.append({"title": self.windowTitle(), "text": self.text(),
                     "info": self.informativeText()})
        return QMessageBox.Ok

    monkeypatch.setattr(QMessageBox, "exec", fake_exec)
    return seen


@pytest.fixture
def settings(tmp_path):
    from PySide6.QtCore import QSettings
    return QSettings(str(tmp_path / "settings.ini"), QSettings.IniFormat)


@pytest.fixture
def window(qtbot, settings, dialogs):
    from app.window import MainWindow
    w = MainWindow(settings)
    qtbot.addWidget(w)
    w.resize(1400, 900)
    w.show()
    yield w
    w.shutdown_jobs()
    w.session.mark_saved()        # close without the "Save changes?" question
    w.close()
