"""The app keeps its state honest: corrections survive, stale results say so, nothing is
lost on quit, counts are not transmittance, exports offer their parts, labels tell the
model, every setting advice names can be set. Waits are on signals and conditions."""

import json
from pathlib import Path

import pytest

pytest.importorskip("PySide6")
from PySide6.QtWidgets import QDialogButtonBox  # noqa: E402

from tests.app.test_window import _fit, _shown  # noqa: E402
from tests.test_export import make_result  # noqa: E402
from tests.test_fit_report import with_verdict  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
REFS = ROOT / "demo_data" / "references"
RAW = REFS / "PL2-T-0115_raw_counts.txt"


def _answer_preview(monkeypatch, *, baseline=None, dark=None, seen=None):
    """Replace the import preview's exec: record its texts, optionally pick reference files."""
    from app.import_dialog import ImportDialog

    def answer(self):
        ok = self.buttons.button(QDialogButtonBox.Ok)
        if seen is not None:
            seen.append({"text": self.result_label.text(), "load": ok.isEnabled(),
                         "reference": self.reference()})
        if baseline is not None:
            self.ref_fields.baseline.setText(str(baseline))
            self.ref_fields.dark.setText(str(dark or ""))
            self.update_preview()
            if seen is not None:
                seen.append({"text": self.result_label.text(), "load": ok.isEnabled(),
                             "reference": self.reference()})
        return ImportDialog.Accepted if ok.isEnabled() else ImportDialog.Rejected

    monkeypatch.setattr(ImportDialog, "exec", answer)


def test_counts_open_in_the_preview_which_offers_the_correction(window, monkeypatch):
    seen = []
    _answer_preview(monkeypatch, seen=seen)
    # Opened without asking for a preview: counts are never loaded as they are.
    assert not window.open_spectrum(RAW)
    assert window.session.spectrum is None
    first = seen[0]
    assert not first["load"]
    assert "Raw detector counts, not a transmittance" in first["text"]
    assert "counts" in first["text"] and "Will load" not in first["text"]
    assert "100 % line" in first["text"]                 # says what to do
    assert "holds raw detector counts" in window.statusBar().currentMessage()
    # With the 100 % line and dark chosen in the preview, the corrected T loads.
    seen.clear()
    _answer_preview(monkeypatch, baseline=REFS / "baseline_100pct.txt", dark=REFS / "dark.txt",
                    seen=seen)
    assert window.open_spectrum(RAW)
    assert seen[-1]["load"] and "Corrected:" in seen[-1]["text"]
    s = window.session.spectrum
    assert s.quantity == "T" and s.values.max() < 1.0
    assert s.metadata["reference_correction"]["formula"] == "(S - D) / (B - D)"


def test_reference_correction_survives_import_settings_and_a_project(window, qtbot, monkeypatch,
                                                                      tmp_path, dialogs):
    _answer_preview(monkeypatch, baseline=REFS / "baseline_100pct.txt", dark=REFS / "dark.txt")
    assert window.open_spectrum(RAW)
    ref = dict(window.session.reference)
    corrected = window.session.spectrum.values.copy()
    info = window.spectrum_panel.info.text()
    assert "Reference-corrected" in info and "baseline_100pct.txt" in info and "dark.txt" in info
    assert window.spectrum_panel.reference_button.text() == "Change correction…"
    # "Import settings…" shows the correction filled in and keeps it.
    seen = []
    _answer_preview(monkeypatch, seen=seen)
    window.reimport()
    assert seen[0]["reference"] == ref and seen[0]["load"]
    assert window.session.reference == ref
    assert (window.session.spectrum.values == corrected).all()
    # A project keeps it: a new window shows the same corrected spectrum and says so.
    path = tmp_path / "line2.pellucid.json"
    assert window.save_project_to(path)
    saved = json.loads(path.read_text())["reference"]
    assert saved["baseline"]["path"].endswith("baseline_100pct.txt") and saved["raw_counts"]
    from app.window import MainWindow
    w2 = MainWindow(window.settings)
    qtbot.addWidget(w2)
    assert w2.open_project(path)
    assert w2.session.reference["baseline"] == ref["baseline"]
    assert (w2.session.spectrum.values == corrected).all()
    assert "Reference-corrected" in w2.spectrum_panel.info.text()
    assert not w2.session.is_modified()


def test_result_goes_out_of_date_and_export_asks_first(window, qtbot, demo_csv, tmp_path,
                                                       monkeypatch, dialogs):
    import app.window as win_mod
    from app.export_dialog import ExportDialog
    s = window.session
    window.open_spectrum(demo_csv)
    fit_hash = s.recipe(name="interactive fit").hash()
    _fit(window, qtbot)
    assert not s.result_stale and not window.results.banner.isVisibleTo(window)
    assert s.result_recipe_hash == fit_hash
    qtbot.waitUntil(lambda: not window.plot.pending)
    labels = [t.get_text() for t in window.plot.ax.get_legend().get_texts()]
    assert "fitted model" in labels
    # The model changes: the result is marked, in words and by a struck-through thickness.
    s.set_layer_model(0, "sellmeier")
    assert s.result_stale and s.stale_reason == "the sample stack"
    assert window.results.banner.isVisibleTo(window)
    assert "Out of date" in window.results.banner.text()
    assert window.results.thickness_label.font().strikeOut()
    qtbot.waitUntil(lambda: not window.plot.pending)
    labels = [t.get_text() for t in window.plot.ax.get_legend().get_texts()]
    assert "fitted model" not in labels and "model (current stack)" in labels
    # Export asks first; "No" writes nothing (no export dialog opens).
    asked = []
    monkeypatch.setattr(win_mod, "ask_yes_no", lambda *a: asked.append(a[2]) or False)
    window.export_dialog()
    assert asked and "out of date" in asked[0] and "sample stack" in asked[0]
    # "Yes": the files carry the hash of the recipe the fit ran with, and a note.
    monkeypatch.setattr(win_mod, "ask_yes_no", lambda *a: True)

    def choose(self):
        self.folder_edit.setText(str(tmp_path / "out"))
        return ExportDialog.Accepted

    monkeypatch.setattr(ExportDialog, "exec", choose)
    window.export_dialog()
    doc = json.loads(next((tmp_path / "out").glob("*_result.json")).read_text())
    assert doc["provenance"]["recipe_hash"] == fit_hash != s.recipe().hash()
    assert "out of date" in doc["provenance"]["note"]
    # Undo brings the setup back to what was fitted: the result is current again.
    window.act_undo.trigger()
    assert not s.result_stale and not window.results.banner.isVisibleTo(window)
    s.set_option("angle_deg", 5.0)
    assert s.stale_reason == "the fit options"
    s.add_mask(500, 520)
    assert s.stale_reason == "the fit options and the masked windows"


def test_quit_asks_and_a_reopened_project_shows_its_result(window, qtbot, demo_csv, tmp_path,
                                                           monkeypatch):
    import app.window as win_mod
    from PySide6.QtWidgets import QFileDialog
    window.open_spectrum(demo_csv)
    assert not window.session.is_modified()              # a file on disk: nothing to lose
    _fit(window, qtbot)
    assert window.session.is_modified() and window.windowTitle().endswith("*")
    answers = []
    # (After the test, pytest-qt closes the windows again: those get "discard".)
    monkeypatch.setattr(win_mod, "ask_save_discard_cancel",
                        lambda *a: answers.pop(0) if answers else "discard")
    answers.append("cancel")
    assert not window.close() and window.isVisible()      # Cancel keeps the window
    path = tmp_path / "kept.pellucid.json"
    monkeypatch.setattr(QFileDialog, "getSaveFileName",
                        staticmethod(lambda *a, **k: (str(path), "")))
    answers.append("save")
    assert window.close() and path.is_file()
    shown = window.results.thickness_label.text()

    from app.window import MainWindow
    w2 = MainWindow(window.settings)
    qtbot.addWidget(w2)
    assert w2.open_project(path)
    assert "No fit yet" not in w2.results.headline.text()
    assert w2.results.thickness_label.text() == shown
    assert not w2.session.result_stale and not w2.session.is_modified()
    assert "stored result" in w2.statusBar().currentMessage()
    # Discard closes without writing.
    w2.session.set_option("angle_deg", 3.0)
    assert w2.session.is_modified() and w2.session.result_stale
    before = path.read_text()
    answers.append("discard")
    assert w2.close() and path.read_text() == before


def test_out_of_date_result_stays_out_of_date_in_the_project(window, qtbot, tmp_path):
    s = window.session
    s.set_result(make_result("coupon", 480.0), apply=False, recipe_hash="ab" * 32)
    s.set_option("angle_deg", 4.0)
    assert s.result_stale
    path = tmp_path / "p.pellucid.json"
    assert window.save_project_to(path)
    from app.window import MainWindow
    w2 = MainWindow(window.settings)
    qtbot.addWidget(w2)
    assert w2.open_project(path)
    assert w2.session.result_stale and w2.results.banner.isVisibleTo(w2)
    assert w2.session.result_recipe_hash == "ab" * 32


def test_export_dialog_offers_the_parts_and_a_pdf_report(window, qtbot, demo_csv, tmp_path,
                                                         monkeypatch, dialogs):
    from app.export_dialog import ExportDialog
    window.open_spectrum(demo_csv)
    _fit(window, qtbot)
    dlg = ExportDialog(str(tmp_path), window.settings, window)
    qtbot.addWidget(dlg)
    assert dlg.part_boxes["pdf"].isChecked()             # the report is offered by default
    for cb in dlg.part_boxes.values():
        cb.setChecked(False)
    assert not dlg.buttons.button(QDialogButtonBox.Ok).isEnabled()
    assert "Tick at least one" in dlg.summary.text()

    def choose(self):
        self.folder_edit.setText(str(tmp_path / "out"))
        for key, cb in self.part_boxes.items():
            cb.setChecked(key in ("nk", "pdf"))
        self._accept()
        return ExportDialog.Accepted

    monkeypatch.setattr(ExportDialog, "exec", choose)
    window.export_dialog()
    names = sorted(p.name for p in (tmp_path / "out").iterdir())
    assert names == ["demo_film_nk_film.csv", "demo_film_report.pdf"]
    assert (tmp_path / "out" / "demo_film_report.pdf").read_bytes().startswith(b"%PDF")
    assert dialogs[-1]["title"] == "Export done"
    again = ExportDialog(str(tmp_path), window.settings, window)   # the choice is remembered
    qtbot.addWidget(again)
    assert again.parts() == ("pdf", "nk")


def test_multi_term_models_are_labelled_from_the_model(window):
    from fitting.dispersion import Lorentz, Oscillators, Sellmeier, TaucLorentz
    from fitting.stack import Layer, Stack
    s, sp = window.session, window.stack_panel
    st = Stack.from_dict(s.stack.to_dict())
    st.layers = [Layer("film", Oscillators(2.0, [TaucLorentz(), Lorentz(1.0, 6.0, 0.5)]),
                       300.0)]
    s.set_stack(st)
    item = sp.layer_list.item(0).text()
    assert "Tauc-Lorentz + Lorentz" in item and "Drude" not in item
    assert sp.model_combo.currentText() == "Tauc-Lorentz + Lorentz (as loaded)"
    st = Stack.from_dict(s.stack.to_dict())
    st.layers[0].material = Sellmeier(3)
    s.set_stack(st)
    assert "Sellmeier, 3 terms" in sp.layer_list.item(0).text()
    assert sp.model_combo.currentText() == "Sellmeier, 3 terms (as loaded)"
    # Choosing a menu entry replaces the custom model; the "(as loaded)" entry goes.
    sp.model_combo.setCurrentIndex(sp.model_combo.findData("cauchy"))
    sp._on_model(sp.model_combo.currentIndex())
    assert s.stack.layers[0].material.kind == "cauchy"
    assert sp.model_combo.findText("Sellmeier, 3 terms (as loaded)") < 0
    s.set_layer_model(0, "drude_lorentz")
    assert "Drude + Lorentz" in sp.layer_list.item(0).text()
    assert sp.model_combo.currentData() == "drude_lorentz"


def test_more_settings_set_what_advice_asks_for(window, tmp_path):
    from fitting.presets import default_stack
    from fitting.recipe import Recipe, save_recipe
    fp, s = window.fit_panel, window.session
    assert not fp.more_button.isChecked() and not fp.more.isVisibleTo(window)
    fp.more_button.setChecked(True)
    assert fp.more.isVisibleTo(window)
    assert "max_nfev" in fp.max_nfev.toolTip()
    fp.max_nfev.setValue(50000)
    fp.time_limit.setValue(120)
    fp.spread.setValue(2.0)
    fp.fit_spread.setCurrentIndex(fp.fit_spread.findText("always fit it"))
    fp.bandwidth.setValue(2.0)
    rec = s.recipe()
    assert rec.fit_options["max_nfev"] == 50000 and rec.fit_options["time_limit_s"] == 120.0
    assert rec.fit_options["fit_spread"] is True
    assert rec.stack.thickness_spread == pytest.approx(0.02)
    assert rec.stack.bandwidth_nm == pytest.approx(2.0)
    window.act_undo.trigger()
    assert s.stack.bandwidth_nm == 0.0 and fp.bandwidth.text().startswith("ideal")
    # A recipe with a non-default budget opens the section by itself.
    path = tmp_path / "r.recipe.json"
    save_recipe(Recipe(default_stack(), fit_options={"max_nfev": 90000}), path)
    fp.more_button.setChecked(False)
    assert window.load_recipe(path)
    assert fp.more_button.isChecked() and fp.max_nfev.value() == 90000


def test_empty_range_progress_reset_and_about(window, qtbot, demo_csv, dialogs):
    import fitting
    fp = window.fit_panel
    assert fp.range_lo.text() == "–" and fp.range_hi.text() == "–"
    window.open_spectrum(demo_csv)
    assert fp.range_lo.text() == "350.0 nm" and fp.range_hi.text() == "1100.0 nm"
    _fit(window, qtbot)
    assert fp.progress.format().startswith("done")
    window.open_spectrum(demo_csv)
    assert fp.progress.format() == "idle" and fp.stage.text() == ""
    about = [a for a in window.menuBar().actions() if a.text() == "&Help"][0].menu()
    [a for a in about.actions() if "About" in a.text()][0].trigger()
    text = dialogs[-1]["text"]
    assert dialogs[-1]["title"] == "About Pellucid"
    assert f"Pellucid {fitting.__version__}" in text and "MIT" in text and "Safety" in text


def test_result_figures_are_drawn_when_shown_and_kept(window, qtbot):
    res = window.results
    s = window.session
    s.set_result(make_result("coupon", 500.0), apply=False)
    # Nothing is drawn for tabs not on show.
    assert all(t.figure is None and not t.busy for t in (res.optical_tab, res.corr_tab))
    res.setCurrentWidget(res.optical_tab)
    first = _shown(res.optical_tab, qtbot)
    assert len(first.axes) >= 3
    res.setCurrentWidget(res.tauc_tab)
    assert "Eg = 3.410" in " ".join(t.get_text() for t in
                                     _shown(res.tauc_tab, qtbot).axes[0].get_legend().get_texts())
    res.setCurrentWidget(res.optical_tab)
    assert not res.optical_tab.busy and res.optical_tab.figure is first    # kept, not redrawn
    s.set_result(make_result("coupon", 520.0, band_gap=False), apply=False)
    qtbot.waitUntil(lambda: res.optical_tab.figure is not first and res.optical_tab.figure
                    is not None and not res.optical_tab.busy, timeout=30000)
    res.setCurrentWidget(res.tauc_tab)
    assert res.tauc_tab.figure is None and "No band gap" in res.tauc_tab.image.text()


def test_options_changed_while_a_fit_ran_make_its_result_out_of_date(window):
    s = window.session
    setup = s.setup_fingerprint()              # what the window takes when Fit is pressed
    s.set_option("fit_offset", True)           # the Fit section stays editable meanwhile
    s.set_result(make_result("coupon", 500.0), apply=False, setup=setup)
    assert s.result_stale and s.stale_reason == "the fit options"
    s.set_option("fit_offset", False)          # back to the setup the fit ran with
    assert not s.result_stale


def test_a_verdict_is_shown_in_words_and_a_symbol(window):
    base = make_result("coupon", 500.0)
    r = with_verdict(base, "poor", ["reduced χ² 40: the model misses the data"])
    window.session.set_result(r, apply=False)
    head = window.results.headline.text()
    assert "✖" in head and "Verdict: poor" in head and "model misses the data" in head
    window.session.set_result(with_verdict(base, "", []), apply=False)   # none: no line
    assert "Verdict" not in window.results.headline.text()


def test_tilt_of_the_100_percent_line_has_a_control_where_the_engine_has_it(window):
    s, fp = window.session, window.fit_panel
    if "fit_tilt" not in s.options:
        assert not fp.fit_tilt.isVisibleTo(window)      # no control for a missing option
        pytest.skip("this fit engine has no fit_tilt option")
    assert fp.fit_tilt.isVisibleTo(window) and fp.fit_tilt.toolTip()
    fp.fit_tilt.setChecked(not s.options["fit_tilt"])
    assert s.recipe().fit_options["fit_tilt"] is fp.fit_tilt.isChecked()
