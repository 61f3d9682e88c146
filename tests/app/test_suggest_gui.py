"""Model suggestion from the app: the button, the Models tab, adopting the choice, the
recipe option and stopping it.

The spectra are synthetic (invented demo data): a 650 nm Cauchy film (A = 2.0,
B = 0.02 µm²) on fused silica from the project's own stack engine, which is checked
against ``tmm`` elsewhere. Waits are on signals and conditions only.
"""

import pytest

pytest.importorskip("PySide6")
from PySide6.QtCore import Qt  # noqa: E402

from tests.app.conftest import synthetic_spectrum  # noqa: E402


def _run(window, qtbot, start, timeout=60000):
    """Start a fit or suggestion and wait until the window has handled its end."""
    ended = []
    assert start()
    window.fit_job.done.connect(lambda: ended.append(True))
    qtbot.waitUntil(lambda: bool(ended), timeout=timeout)


def _table(view):
    t = view.table
    return [[t.item(i, j).text() if t.item(i, j) else "" for j in range(t.columnCount())]
            for i in range(t.rowCount())]


@pytest.fixture
def small_csv(tmp_path):
    return synthetic_spectrum(tmp_path / "film650.csv", points=150)


def test_suggest_button_ranks_the_models_and_keeps_the_users_when_it_wins(window, qtbot,
                                                                          small_csv):
    window.open_spectrum(small_csv)
    fp = window.fit_panel
    assert fp.suggest_button.isEnabled() and fp.suggest_button.toolTip()
    assert not window.results.isTabVisible(window.results.indexOf(window.results.models))
    _run(window, qtbot, lambda: (qtbot.mouseClick(fp.suggest_button, Qt.LeftButton)
                                 or window.fit_job is not None))
    s = window._last_suggestion
    assert s is not None and not s.stopped
    r = window.session.result
    assert r is s.result                                  # the chosen model's fit is the result
    # A clear film: the transparent families are tried besides the user's Cauchy, and
    # the data were made with a Cauchy film, 650 nm.
    assert {c.model for c in s.candidates} >= {"cauchy", "sellmeier"}
    assert s.chosen == "cauchy" and s.chosen_candidate.current
    assert r.thickness()[0] == pytest.approx(650.0, abs=2.0)
    # The user's own model won: its fit is applied like a plain fit, nothing to adopt.
    assert window.session.param("film_thickness").value == pytest.approx(r.thickness()[0])
    view = window.results.models
    assert window.results.currentWidget() is view
    assert not view.adopt_button.isEnabled()
    assert "is the model in the stack" in view.adopt_button.text()
    # The table lists every candidate in ranked order with the suggestion's numbers.
    rows = _table(view)
    assert len(rows) == len(s.candidates)
    for i, (row, c) in enumerate(zip(rows, s.candidates)):
        assert row[0].replace("✔ ", "").replace("\n+ ", " + ").split("\n")[0] == c.label
        assert row[1] == str(c.k)
        for cell, x in ((row[3], c.bic), (row[4], c.delta_bic)):   # as rounded on show
            assert float(cell) == pytest.approx(x, abs=0.05 if abs(x) < 1000 else 0.5)
        sym = {"good": "✔", "check": "⚠", "poor": "✖"}[c.verdict]
        assert row[5] == sym
        assert c.verdict in view.table.item(i, 5).toolTip()          # and in words
    assert rows[0][0].startswith("✔") and rows[0][0].endswith("(yours)")
    assert "Chosen for layer 'film': Cauchy" in view.reason.text()
    assert "lowest BIC" in view.reason.text()
    assert "Models tab" in window.results.headline.text()
    assert "models fitted" in fp.progress.format()
    # The provenance names a recipe that reproduces this in a batch: suggest_model on.
    assert window.session.result_recipe_hash == window._fit_origin[0]


def test_a_chosen_model_that_is_not_the_users_is_offered_and_adopted_undoably(window, qtbot,
                                                                              small_csv):
    s = window.session
    window.open_spectrum(small_csv)
    s.set_layer_model(0, "constant")                    # no dispersion: misses the data
    s.set_option("suggest_model", ("cauchy",))          # the recipe option, with one model
    fp = window.fit_panel
    assert fp.suggest_option.isChecked() and "Cauchy" in fp.suggest_option.text()
    assert fp.fit_button.text() != "Fit"                # Fit now runs the suggestion
    _run(window, qtbot, window.start_fit)
    sug = window._last_suggestion
    assert sug.chosen == "cauchy" and not sug.chosen_candidate.current
    assert [c.model for c in sug.candidates] == ["cauchy", "constant"]
    # Not put into the stack by itself: the stack keeps the user's model and values,
    # and σ of the other model's parameters is not shown beside them.
    assert s.stack.layers[0].material.kind == "constant"
    assert s.param("film_thickness").value == 500.0
    assert window.stack_panel.table_model.index(0, 6).data() == ""
    assert not s.result_stale
    view = window.results.models
    assert view.adopt_button.isEnabled() and view.adopt_button.text() == "Use Cauchy in the stack"
    assert "Press 'Use Cauchy in the stack'" in window.statusBar().currentMessage()
    qtbot.mouseClick(view.adopt_button, Qt.LeftButton)
    assert s.stack.layers[0].material.kind == "cauchy"
    assert s.param("film_thickness").value == pytest.approx(650.0, abs=2.0)
    assert not s.result_stale                           # the result describes this stack
    assert not view.adopt_button.isEnabled()
    assert window.stack_panel.table_model.index(0, 6).data() != ""
    window.act_undo.trigger()
    assert s.stack.layers[0].material.kind == "constant" and not s.result_stale
    assert view.adopt_button.isEnabled()
    window.act_redo.trigger()
    assert s.stack.layers[0].material.kind == "cauchy" and not s.result_stale
    s.set_param("film_thickness", value=600.0)          # a real edit still counts
    assert s.result_stale


def test_the_recipe_option_is_a_tick_box_saved_with_the_recipe(window, tmp_path):
    from fitting.recipe import load_recipe
    fp = window.fit_panel
    assert not fp.suggest_option.isChecked() and fp.fit_button.text() == "Fit"
    fp.suggest_option.setChecked(True)
    assert window.session.options["suggest_model"] is True
    assert fp.more_button.isChecked()                   # a non-default shows itself
    assert window.save_recipe_to(tmp_path / "line3.recipe.json")
    assert load_recipe(tmp_path / "line3.recipe.json").suggest_model is True
    window.act_undo.trigger()
    assert window.session.options["suggest_model"] is False
    assert not fp.suggest_option.isChecked()
    assert window.session.recipe().suggest_model is False


def test_a_stopped_suggestion_says_not_every_model_was_fitted(window, qtbot, tmp_path):
    # A slow setup (many points, thickness spread, slit width): the first candidate is
    # still being fitted when Cancel arrives.
    window.open_spectrum(synthetic_spectrum(tmp_path / "slow.csv", points=1500))
    s = window.session
    s.set_layer_model(0, "tauc_lorentz")
    s.set_stack_option("thickness_spread", 0.02)
    s.set_stack_option("bandwidth_nm", 2.0)
    qtbot.waitUntil(lambda: not window.plot.pending)

    def start():
        ok = window.start_suggestion()
        window.fit_job.progress.connect(lambda _p: window.cancel())
        return ok

    _run(window, qtbot, start)
    sug = window._last_suggestion
    assert sug is not None and sug.stopped
    assert not all(c.ranked for c in sug.candidates)
    view = window.results.models
    assert "Stopped" in view.reason.text() and "not every model was fitted" in \
        view.reason.text()
    assert "stopped before any model finished" in window.results.headline.text()
    assert "stopped" in window.statusBar().currentMessage()
    assert "stopped" in window.fit_panel.progress.format()
    assert window.fit_panel.fit_button.isEnabled()      # the window is usable again
