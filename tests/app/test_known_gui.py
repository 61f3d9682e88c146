"""Known layers from the app: the "Known (do not fit)" tick box, the parameter table
that shows held parameters as not fitted, and loading n, κ from an earlier result.

The earlier result is a FitResult assembled by hand (tests/test_export.py's
``make_result``: invented demo values, a 500 nm Cauchy film with an Urbach tail,
300-1000 nm) and exported as a technician would, with ``fitting.export``.
"""

import shutil

import pytest

pytest.importorskip("PySide6")
from PySide6.QtCore import Qt  # noqa: E402

from tests.app.conftest import synthetic_spectrum  # noqa: E402


@pytest.fixture
def export(tmp_path):
    """``week1_nk_film.csv`` and ``week1_result.json`` of an earlier fit."""
    from fitting.export import export_result, make_provenance
    from tests.test_export import make_result
    r = make_result("week1", 500.0)
    out = tmp_path / "week1"
    export_result(r, out, stem="week1", provenance=make_provenance(r), parts=("nk", "json"))
    return out / "week1_nk_film.csv"


@pytest.fixture
def ask(monkeypatch):
    """Answer the thickness question with the next value of ``ask.answers`` and record it."""
    from PySide6.QtWidgets import QInputDialog

    class Ask:
        answers, asked = [], []

    def get_double(parent, title, label, *a, **k):
        Ask.asked.append(label)
        v = Ask.answers.pop(0)
        return (v, True) if v is not None else (0.0, False)

    monkeypatch.setattr(QInputDialog, "getDouble", staticmethod(get_double))
    return Ask


def _fit_cell(window, row):
    m = window.stack_panel.table_model
    return m.index(row, 5)


def test_known_tick_box_holds_the_layer_and_can_be_undone(window):
    sp, s = window.stack_panel, window.session
    m = sp.table_model
    assert sp.known_box.toolTip() and not sp.known_box.isChecked()
    assert m.data(_fit_cell(window, 0), Qt.CheckStateRole) == Qt.Checked   # thickness fitted
    assert m.flags(_fit_cell(window, 0)) & Qt.ItemIsUserCheckable
    sp.known_box.setChecked(True)
    assert s.stack.layers[0].known
    # Held: every Fit tick shows as off and cannot be changed while the layer is known.
    for row in range(m.rowCount()):
        assert m.data(_fit_cell(window, row), Qt.CheckStateRole) == Qt.Unchecked
        assert not m.flags(_fit_cell(window, row)) & Qt.ItemIsEnabled
    assert "known" in m.data(_fit_cell(window, 0), Qt.ToolTipRole)
    assert not m.setData(_fit_cell(window, 0), Qt.Checked, Qt.CheckStateRole)
    assert "known" in sp.layer_list.item(0).text()
    assert all(not p.vary for p in s.stack.parameters().values())      # what a fit sees
    # The layer's own flags are kept: unticking gives them back.
    sp.known_box.setChecked(False)
    assert not s.stack.layers[0].known
    assert m.data(_fit_cell(window, 0), Qt.CheckStateRole) == Qt.Checked
    window.act_undo.trigger()
    assert s.stack.layers[0].known and sp.known_box.isChecked()
    window.act_undo.trigger()
    assert not s.stack.layers[0].known and not sp.known_box.isChecked()


def test_load_a_known_layer_from_an_earlier_export(window, export):
    sp, s = window.stack_panel, window.session
    name = sp.load_known(export)
    assert name == "film2"                          # "film" is taken by the film to fit
    layer = s.stack.layers[0]
    assert layer.name == "film2" and layer.known and layer.material.kind == "tabulated"
    # The thickness came from the fit result beside the table (make_result: 500 nm).
    assert layer.thickness.value == pytest.approx(500.0)
    assert layer.source["thickness"]["from"] == "week1_result.json"
    assert sp.layer_list.currentRow() == 0 and sp.known_box.isChecked()
    assert "known" in sp.layer_list.item(0).text()
    assert "week1_nk_film.csv" in sp.layer_list.item(0).toolTip()
    assert not sp.table_model.flags(_fit_cell(window, 0)) & Qt.ItemIsEnabled
    assert "held as known" in window.statusBar().currentMessage()
    window.act_undo.trigger()
    assert [x.name for x in s.stack.layers] == ["film"]
    # Reusing only n, κ: the thickness is fitted.
    sp.load_known(export, fit_thickness=True)
    layer = s.stack.layers[0]
    assert not layer.known and layer.thickness.vary
    assert sp.table_model.data(_fit_cell(window, 0), Qt.CheckStateRole) == Qt.Checked


def test_a_table_without_its_result_asks_for_the_thickness(window, export, tmp_path, ask):
    sp, s = window.stack_panel, window.session
    plain = tmp_path / "barrier_table.csv"
    shutil.copy(export, plain)                      # no fit result beside it
    ask.answers = [None]                            # Cancel: nothing is added
    assert sp.load_known(plain) is None
    assert len(s.stack.layers) == 1 and len(ask.asked) == 1
    assert "barrier_table.csv" in ask.asked[0] and "held" in ask.asked[0]
    ask.answers = [98.5]
    name = sp.load_known(plain)
    layer = next(x for x in s.stack.layers if x.name == name)
    assert layer.known and layer.thickness.value == 98.5
    assert layer.source["thickness"]["from"] == "given"


def test_load_errors_are_shown_with_what_to_do(window, export, tmp_path, dialogs):
    sp, s = window.stack_panel, window.session
    # The table (300-1000 nm) does not cover the loaded spectrum (350-1100 nm).
    window.open_spectrum(synthetic_spectrum(tmp_path / "wide.csv", points=100))
    n = len(dialogs)
    assert sp.load_known(export) is None
    assert len(dialogs) == n + 1 and dialogs[-1]["title"] == "Layer not added"
    assert "1000" in dialogs[-1]["text"] + dialogs[-1]["info"]
    # A cut-off table names the file and the line.
    bad = tmp_path / "cut" / export.name
    bad.parent.mkdir()
    text = export.read_text(encoding="utf-8")
    bad.write_text(text[: len(text) - 7], encoding="utf-8")
    assert sp.load_known(bad) is None
    assert export.name in dialogs[-1]["text"] + dialogs[-1]["info"]
    assert len(s.stack.layers) == 1


def test_a_table_that_covers_the_fit_range_is_enough(window, export, tmp_path, qtbot):
    """The fit uses only the fit range, so a table covering it is accepted, and the
    live model curve is drawn there instead of not at all."""
    sp, s = window.stack_panel, window.session
    window.open_spectrum(synthetic_spectrum(tmp_path / "wide.csv", points=100))
    s.set_option("fit_range_nm", (360.0, 1000.0))
    assert sp.load_known(export) == "film2"
    qtbot.waitUntil(lambda: not window.plot.pending)
    model = window.plot.image_data()["model"]
    wl = s.spectrum.wavelength_nm
    inside = (wl >= 360.0) & (wl <= 1000.0)
    assert model is not None and model.size == inside.sum() < wl.size
    s.set_option("fit_range_nm", None)                  # the whole spectrum again: refused
    qtbot.waitUntil(lambda: not window.plot.pending)
    assert window.plot.image_data()["model"] is None
