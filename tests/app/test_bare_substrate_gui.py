"""The substrate can be a measured bare slide (fitting.bare_substrate through the GUI)."""

import numpy as np
import pytest

pytest.importorskip("PySide6")


def test_bare_slide_spectrum_becomes_the_substrate(window, tmp_path):
    from fitting.reader import write_spectrum
    from fitting.spectrum import Spectrum
    from fitting.stack import Stack
    from fitting.substrates import library_substrate

    wl = np.linspace(350, 1100, 200)
    T = Stack([], library_substrate("fused_silica", 1.0)).transmittance(wl) - 0.003
    path = write_spectrum(tmp_path / "bare.csv", Spectrum(wl, T))
    sp = window.stack_panel
    assert sp.set_substrate_bare(str(path))
    sub = window.session.stack.substrate
    assert "bare slide" in sub.name
    # 0.3 % less T than the clear glass shows up as absorption of the slide.
    assert np.all(sub.N(wl).imag > 0)


def test_unreadable_bare_slide_file_is_refused_with_a_dialog(window, tmp_path, dialogs):
    bad = tmp_path / "bare.csv"
    bad.write_text("not a spectrum\n", encoding="utf-8")
    assert window.stack_panel.set_substrate_bare(str(bad)) is False
    assert dialogs and "Substrate not changed" in dialogs[-1]["title"]
    assert window.session.stack.substrate.library == "fused_silica"
