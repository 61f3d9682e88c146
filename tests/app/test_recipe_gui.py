"""A recipe loaded into the app saves back with everything the app did not change, and
the import preview lists what the reader chose or skipped.

The recipe is invented (a coating line's film with specification limits, a 100 %
line and dark file, chosen outputs and the model-suggestion option).
"""

import json

import pytest

pytest.importorskip("PySide6")


@pytest.fixture
def full_recipe(tmp_path):
    """A recipe file using every section the app has no control for."""
    from fitting.presets import default_stack
    from fitting.recipe import Recipe, save_recipe
    refs = tmp_path / "refs"
    refs.mkdir()
    for name in ("100pct.csv", "dark.csv"):
        (refs / name).write_text("400,1000\n500,1000\n", encoding="utf-8")
    r = Recipe(default_stack(), name="line3", notes="coating line 3, front side",
               fit_options={"time_limit_s": 30.0}, range_nm=(380.0, 1050.0),
               masks_nm=[(655.0, 657.0)],
               limits={"film_thickness": {"target": 650, "tol": 20},
                       "film_n@633": {"min": 1.95, "max": 2.1}, "film_A": {"min": 1.5},
                       "redchi": {"max": 5}},
               exports=("json", "nk"), plot_formats=("svg", "pdf"),
               reference={"baseline": "refs/100pct.csv", "dark": "refs/dark.csv"},
               suggest_model=("cauchy", "sellmeier"))
    path = tmp_path / "line3.recipe.json"
    save_recipe(r, path)
    return path


def _without_name(path):
    from fitting.recipe import load_recipe
    d = load_recipe(path).to_dict()
    d.pop("name")
    return d


def test_a_loaded_recipe_saves_back_unchanged(window, full_recipe, tmp_path):
    from fitting.recipe import load_recipe
    assert window.load_recipe(full_recipe)
    fp = window.fit_panel
    assert fp.suggest_option.isChecked() and "Sellmeier" in fp.suggest_option.text()
    # Saved beside the original: every section comes back as it was, relative paths too.
    out = tmp_path / "again.recipe.json"
    assert window.save_recipe_to(out)
    assert _without_name(out) == _without_name(full_recipe)
    saved = json.loads(out.read_text(encoding="utf-8"))
    assert saved["reference"] == {"baseline": "refs/100pct.csv", "dark": "refs/dark.csv"}
    # Saved elsewhere: the reference files are still found.
    other = tmp_path / "elsewhere" / "copy.recipe.json"
    other.parent.mkdir()
    assert window.save_recipe_to(other)
    assert load_recipe(other).reference_files() == load_recipe(full_recipe).reference_files()
    assert load_recipe(other).limits == load_recipe(full_recipe).limits
    # A batch from the app runs the same recipe.
    assert window.session.recipe().limits == load_recipe(full_recipe).limits
    assert window.session.recipe().suggest_model == ("cauchy", "sellmeier")


def test_limits_follow_the_stack_edits(window, full_recipe, tmp_path):
    from fitting.recipe import load_recipe
    s = window.session
    window.load_recipe(full_recipe)
    s.rename_layer(0, "oxide")
    limits = s.recipe().limits
    assert {"oxide_thickness", "oxide_n@633", "oxide_A", "redchi"} == set(limits)
    assert limits["oxide_thickness"] == load_recipe(full_recipe).limits["film_thickness"]
    # A model without A: that limit cannot be judged any more, and the user is told.
    s.set_layer_model(0, "constant")
    assert "oxide_A" not in s.recipe().limits and "oxide_thickness" in s.recipe().limits
    assert "oxide_A" in window.statusBar().currentMessage()
    window.act_undo.trigger()
    window.act_undo.trigger()
    assert set(s.recipe().limits) == set(load_recipe(full_recipe).limits)


def test_a_project_keeps_the_recipe_sections(window, full_recipe, tmp_path, qtbot):
    from app.window import MainWindow
    from fitting.recipe import load_recipe
    window.load_recipe(full_recipe)
    assert window.save_project_to(tmp_path / "p.pellucid.json")
    w2 = MainWindow(window.settings)
    qtbot.addWidget(w2)
    assert w2.open_project(tmp_path / "p.pellucid.json")
    r2, r1 = w2.session.recipe(), load_recipe(full_recipe)
    assert (r2.limits, r2.exports, r2.plot_formats, r2.suggest_model, r2.notes) == \
        (r1.limits, r1.exports, r1.plot_formats, r1.suggest_model, r1.notes)
    assert r2.reference_files() == r1.reference_files()
    w2.session.mark_saved()


def test_import_preview_lists_what_the_reader_skipped(qtbot, tmp_path):
    from app.import_dialog import ImportDialog
    f = tmp_path / "lamp_change.csv"
    rows = [f"{400 + i};{80 + i / 10:.1f}".replace(".", ",") for i in range(8)]
    f.write_text("Wavelength (nm);T (%)\n" + "\n".join(rows[:3]) + "\nlamp change\n"
                 + "\n".join(rows[3:]) + "\n", encoding="utf-8")
    dlg = ImportDialog(f)
    qtbot.addWidget(dlg)
    text = dlg.detected.text()
    assert "Notes from reading the file" in text
    assert "line 5" in text and "lamp change" in text      # the line and what it held
    assert "line 5" not in dlg.result_label.text()        # said once, not twice
