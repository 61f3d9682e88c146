"""The main window: data -> model -> fit -> result, left to right.

Left column: the three steps "1 Spectrum", "2 Sample stack", "3 Fit". Centre:
the plot of measured and model spectra with residuals. Right: the result tabs.
The window wires panels to one :class:`~app.session.Session`, owns the menus,
shortcuts, settings and file dialogs, and starts the fit in a
:class:`~app.worker.Job`. It computes nothing itself.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

from PySide6.QtCore import QSettings, Qt
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import (QApplication, QFileDialog, QGroupBox, QLabel, QMainWindow,
                               QMenu, QScrollArea, QSplitter, QVBoxLayout, QWidget)

from fitting.errors import PellucidError
from fitting.fit import fit_spectrum
from fitting.labels import format_pm
from fitting.suggest import Suggestion, suggest_model

from .dialogs import ask_save_discard_cancel, ask_yes_no, show_error, show_info
from .fit_panel import FitPanel
from .plot_panel import AXES, PlotPanel
from .result_panel import ResultPanel
from .session import Session
from .spectrum_panel import SpectrumPanel
from .stack_panel import StackPanel
from .theme import THEMES, apply_theme
from .worker import Job

__all__ = ["MainWindow", "SPECTRUM_FILTER", "PROJECT_FILTER", "RECIPE_FILTER"]

SPECTRUM_FILTER = ("Spectra (*.csv *.txt *.dat *.tsv *.asc *.prn *.sp *.CSV *.TXT *.DAT);;"
                   "All files (*)")
PROJECT_FILTER = "Pellucid project (*.pellucid.json *.json);;All files (*)"
RECIPE_FILTER = "Pellucid recipe (*.recipe.json *.json);;All files (*)"
MAX_RECENT = 8
# Only the section titles are bold; a font set on the box would reach every child.
_BOX_STYLE = "QGroupBox { font-weight: bold; }"


class MainWindow(QMainWindow):
    """The Pellucid main window.

    Parameters
    ----------
    settings : QSettings, optional
        Where geometry, recent files and last folders are kept; tests pass one
        on a temporary file so nothing touches the user's settings.
    """

    def __init__(self, settings: QSettings | None = None, parent=None):
        super().__init__(parent)
        self.settings = settings if settings is not None else QSettings("Pellucid", "Pellucid")
        self.session = Session(self)
        self.fit_job: Job | None = None
        self.batch_dialog = None
        self.setWindowTitle("Pellucid — thin-film thickness and n, κ from spectra")
        self.setAcceptDrops(True)

        s = self.session
        self.spectrum_panel = SpectrumPanel(s)
        self.stack_panel = StackPanel(s)
        self.fit_panel = FitPanel(s)
        self.plot = PlotPanel(s)
        self.results = ResultPanel(s)

        left = QWidget()
        lv = QVBoxLayout(left)
        lv.setContentsMargins(6, 6, 6, 6)
        self.boxes = []
        for title, panel, stretch in (("1   Spectrum", self.spectrum_panel, 0),
                                      ("2   Sample stack", self.stack_panel, 1),
                                      ("3   Fit", self.fit_panel, 0)):
            box = QGroupBox(title)
            box.setStyleSheet(_BOX_STYLE)
            bl = QVBoxLayout(box)
            bl.setContentsMargins(4, 8, 4, 4)
            bl.addWidget(panel)
            lv.addWidget(box, stretch)
            self.boxes.append(box)
        scroll = QScrollArea()
        scroll.setWidget(left)
        scroll.setWidgetResizable(True)
        # Wide enough for the column with every optional control on show.
        hidden = [w for w in (self.fit_panel.more, self.fit_panel.fit_tilt) if w.isHidden()]
        for w in hidden:
            w.setVisible(True)
        scroll.setMinimumWidth(left.minimumSizeHint().width()
                               + scroll.verticalScrollBar().sizeHint().width() + 4)
        for w in hidden:
            w.setVisible(False)
        scroll.setHorizontalScrollBarPolicy(Qt.ScrollBarAlwaysOff)

        right = QGroupBox("4   Result")
        right.setStyleSheet(_BOX_STYLE)
        rl = QVBoxLayout(right)
        rl.setContentsMargins(4, 8, 4, 4)
        rl.addWidget(self.results.banner)
        rl.addWidget(self.results)
        self.result_box = right

        self.splitter = QSplitter(Qt.Horizontal)
        self.splitter.addWidget(scroll)
        self.splitter.addWidget(self.plot)
        self.splitter.addWidget(right)
        self.splitter.setStretchFactor(0, 0)
        self.splitter.setStretchFactor(1, 1)
        self.splitter.setStretchFactor(2, 0)
        self.splitter.setSizes([430, 540, 430])
        self.setCentralWidget(self.splitter)

        self.cursor_label = QLabel("")
        self.cursor_label.setToolTip("Values under the mouse pointer")
        self.statusBar().addPermanentWidget(self.cursor_label)
        self.plot.cursor_text.connect(self.cursor_label.setText)

        # wiring ------------------------------------------------------------------------
        self.spectrum_panel.open_requested.connect(self.open_dialog)
        self.spectrum_panel.preview_requested.connect(self.reimport)
        self.spectrum_panel.reference_requested.connect(self.reference_correction)
        self.stack_panel.error.connect(lambda t, m: show_error(self, t, m))
        self.stack_panel.status.connect(self.status)
        self.fit_panel.status.connect(self.status)
        self.fit_panel.fit_requested.connect(self.start_fit)
        self.fit_panel.suggest_requested.connect(self.start_suggestion)
        self.results.adopt_requested.connect(self.adopt_suggested_model)
        self.fit_panel.cancel_requested.connect(self.cancel)
        s.message.connect(self.status)
        s.modified_changed.connect(self._on_clean_changed)

        self._build_actions()
        self._restore_settings()
        self._update_title()
        self.status("Open a spectrum to begin (Ctrl+O), or drop a file onto the window.")

    # -- menus and shortcuts -----------------------------------------------------------------
    def _action(self, menu, text, slot, shortcut=None, tip=""):
        act = QAction(text, self)
        if shortcut is not None:
            if isinstance(shortcut, (list, tuple)):
                act.setShortcuts([QKeySequence(k) for k in shortcut])
            else:
                act.setShortcut(QKeySequence(shortcut))
        act.setStatusTip(tip)
        act.setToolTip(tip)
        act.triggered.connect(slot)
        menu.addAction(act)
        self.addAction(act)
        return act

    def _build_actions(self):
        mb = self.menuBar()
        m = mb.addMenu("&File")
        self.act_open = self._action(m, "&Open spectrum…", self.open_dialog, QKeySequence.Open,
                                     "Open a measured spectrum")
        self.recent_menu = QMenu("Open &recent", self)
        m.addMenu(self.recent_menu)
        self.spectrum_panel.recent_button.setMenu(self.recent_menu)
        m.addSeparator()
        self.act_open_project = self._action(m, "Open p&roject…", self.open_project_dialog,
                                             "Ctrl+Shift+O", "Reopen a saved project")
        self.act_save_project = self._action(m, "&Save project", self.save_project,
                                             QKeySequence.Save,
                                             "Save spectrum, stack, options and result list")
        self._action(m, "Save project &as…", lambda: self.save_project(ask=True),
                     "Ctrl+Alt+S", "Save the project under a new name")
        m.addSeparator()
        self._action(m, "Load re&cipe…", self.load_recipe_dialog, None,
                     "Take stack and fit options from a saved recipe")
        self._action(m, "Save setup as recipe…", self.save_recipe_dialog, None,
                     "Save stack and fit options for batch runs")
        m.addSeparator()
        self.act_export = self._action(m, "&Export result…", self.export_dialog, "Ctrl+E",
                                       "Write n/κ tables, curves, JSON, report and figures")
        self._action(m, "&Batch fit a folder…", self.batch, "Ctrl+B",
                     "Fit every spectrum in a folder with the current setup")
        m.addSeparator()
        self._action(m, "&Quit", self.close, QKeySequence.Quit, "Close Pellucid")

        e = mb.addMenu("&Edit")
        self.act_undo = self.session.undo.createUndoAction(self, "&Undo")
        self.act_undo.setShortcut(QKeySequence("Ctrl+Z"))
        self.act_undo.setToolTip("Undo the last stack, parameter or option change")
        self.act_redo = self.session.undo.createRedoAction(self, "&Redo")
        self.act_redo.setShortcuts([QKeySequence("Ctrl+Shift+Z"), QKeySequence("Ctrl+Y")])
        self.act_redo.setToolTip("Redo the change just undone")
        for a in (self.act_undo, self.act_redo):
            e.addAction(a)
            self.addAction(a)

        f = mb.addMenu("F&it")
        self.act_fit = self._action(f, "&Fit", self.start_fit, ["Ctrl+R", "F5"],
                                    "Fit the model to the spectrum")
        self.act_suggest = self._action(f, "&Suggest a model", self.start_suggestion, None,
                                        "Fit the film models that suit the spectrum and "
                                        "rank them by BIC")
        self.act_cancel = self._action(f, "&Cancel", self.cancel, "Esc",
                                       "Stop the running fit")

        v = mb.addMenu("&View")
        axes = v.addMenu("x &axis")
        for key, (label, *_r) in AXES.items():
            self._action(axes, label, lambda _=False, k=key: self.plot.set_axis(k), None,
                         f"Plot against {label.lower()}")
        theme = v.addMenu("&Theme")
        for t in THEMES:
            self._action(theme, t.capitalize(), lambda _=False, n=t: self.set_theme(n), None,
                         f"Use the {t} colours")

        h = mb.addMenu("&Help")
        self._action(h, "&Keyboard shortcuts", self.show_shortcuts, "F1",
                     "List the keyboard shortcuts")
        self._action(h, "&About Pellucid", self.show_about, None,
                     "Version, licence and safety note")

    def show_shortcuts(self):
        show_info(self, "Keyboard shortcuts",
                  "Ctrl+O  open a spectrum\nCtrl+R or F5  fit\nEsc  cancel the fit or batch\n"
                  "Ctrl+E  export the result\nCtrl+S  save the project\n"
                  "Ctrl+Shift+O  open a project\nCtrl+B  batch fit a folder\n"
                  "Ctrl+Z / Ctrl+Shift+Z  undo / redo\nF1  this list")

    def about_text(self) -> str:
        """Version (installed package, else the source tree's), licence, safety note."""
        import fitting
        try:
            from importlib.metadata import PackageNotFoundError, version
            v = version("pellucid")
        except PackageNotFoundError:
            v = fitting.__version__
        return (f"Pellucid {v}\n\nFilm thickness and optical constants n, κ from measured "
                "UV-Vis-NIR transmission spectra (transfer-matrix model, incoherent "
                "substrate).\n\nLicence: MIT (see the LICENSE file).\n\n"
                "Safety: spectrophotometer lamps emit UV and samples may be cleaned with "
                "solvents; follow your laboratory's rules and the instrument maker's "
                "instructions.")

    def show_about(self):
        show_info(self, "About Pellucid", self.about_text())

    def set_theme(self, name: str):
        app = QApplication.instance()
        apply_theme(app, name)
        self.settings.setValue("theme", name)
        self.plot.redraw()
        self.results.refresh()

    # -- status --------------------------------------------------------------------------------
    def status(self, text: str, error: bool = False):
        self.statusBar().showMessage(("⚠ " if error else "") + text, 15000 if error else 8000)

    def _on_clean_changed(self, _clean):
        self._update_title()

    def _update_title(self):
        name = Path(self.session.project_path).name if self.session.project_path else "untitled"
        mark = " *" if self.session.is_modified() else ""
        self.setWindowTitle(f"Pellucid — {name}{mark}")

    # -- settings --------------------------------------------------------------------------
    def _restore_settings(self):
        st = self.settings
        geo = st.value("geometry")
        if geo is not None:
            self.restoreGeometry(geo)
        else:
            self.resize(1400, 900)
        state = st.value("window_state")
        if state is not None:
            self.restoreState(state)
        split = st.value("splitter")
        if split is not None:
            self.splitter.restoreState(split)
        self._refresh_recent()

    def save_settings(self):
        st = self.settings
        st.setValue("geometry", self.saveGeometry())
        st.setValue("window_state", self.saveState())
        st.setValue("splitter", self.splitter.saveState())
        st.sync()

    def folder(self, kind: str) -> str:
        return str(self.settings.value(f"folders/{kind}", "") or "")

    def _remember_folder(self, kind: str, path) -> None:
        p = Path(path)
        self.settings.setValue(f"folders/{kind}", str(p if p.is_dir() else p.parent))

    def recent_files(self) -> list[str]:
        v = self.settings.value("recent_files", [])
        if isinstance(v, str):
            v = [v]
        return [str(x) for x in (v or [])]

    def _add_recent(self, path: str):
        items = [p for p in self.recent_files() if p != path]
        self.settings.setValue("recent_files", [path] + items[:MAX_RECENT - 1])
        self._refresh_recent()

    def _refresh_recent(self):
        self.recent_menu.clear()
        items = self.recent_files()
        for p in items:
            act = self.recent_menu.addAction(Path(p).name)
            act.setToolTip(p)
            act.setStatusTip(p)
            act.triggered.connect(lambda _=False, q=p: self.open_spectrum(q))
        if not items:
            a = self.recent_menu.addAction("(none yet)")
            a.setEnabled(False)
        self.spectrum_panel.recent_button.setEnabled(bool(items))

    # -- spectra ---------------------------------------------------------------------------
    def open_dialog(self):
        path, _ = QFileDialog.getOpenFileName(self, "Open a measured spectrum",
                                              self.folder("spectra"), SPECTRUM_FILTER)
        if path:
            self.open_spectrum(path, ask=None)

    def _preview_every_time(self) -> bool:
        v = self.settings.value("show_import_preview", True)
        return v not in (False, "false", "0", 0)

    def open_spectrum(self, path, *, options=None, ask: bool | None = False,
                      reference: dict | None = None) -> bool:
        """Read a spectrum file into the session; on failure explain in a dialog.

        ``ask=None`` follows the user's "show the preview every time" setting,
        ``True`` always shows the import preview, ``False`` does not, except for a
        file of raw detector counts, which is never loaded as it is: the preview
        opens so the 100 % line can be chosen. ``reference`` (the session's
        correction) is applied again after reading.
        """
        path = str(path)
        if self._busy("opening a spectrum"):
            return False
        if ask is None:
            ask = self._preview_every_time()
        from .reference_dialog import is_counts, read_with_reference
        try:
            spectrum = None
            if not ask:
                spectrum = read_with_reference(path, options, reference)
                if is_counts(spectrum):
                    self.status(f"{Path(path).name} holds raw detector counts: choose the "
                                f"100 % line in the preview to correct them.", True)
                    ask = True
            if ask:
                from .import_dialog import ImportDialog
                dlg = ImportDialog(path, options or self.session.reader_options, self,
                                   show_every_time=self._preview_every_time(),
                                   reference=reference, start_dir=self.folder("spectra"))
                if dlg.exec() != ImportDialog.Accepted:
                    return False
                self.settings.setValue("show_import_preview", dlg.every_time.isChecked())
                options = dlg.options()
                reference = dlg.reference()
                spectrum = dlg.spectrum or read_with_reference(path, options, reference)
                if is_counts(spectrum):
                    return False
        except (PellucidError, OSError) as exc:
            show_error(self, f"Could not open {Path(path).name}", exc)
            self.status(f"Not loaded: {exc}", True)
            return False
        self.session.set_spectrum(spectrum, path=path, reader_options=options,
                                  reference=reference)
        self.fit_panel.reset_progress()
        self._remember_folder("spectra", path)
        self._add_recent(path)
        done = "Loaded and corrected" if reference else "Loaded"
        self.status(f"{done} {Path(path).name}: {len(spectrum)} points")
        for w in spectrum.warnings:
            self.status(f"{Path(path).name}: {w}", True)
        return True

    def reimport(self):
        """Show the import preview of the loaded file again; its correction is kept."""
        if self.session.spectrum_path:
            self.open_spectrum(self.session.spectrum_path, options=self.session.reader_options,
                               ask=True, reference=self.session.reference)

    def reference_correction(self):
        from .reference_dialog import ReferenceDialog
        if not self.session.spectrum_path:
            return
        dlg = ReferenceDialog(self.session.spectrum_path, self.folder("spectra"), self,
                              reference=self.session.reference)
        if dlg.exec() != ReferenceDialog.Accepted:
            return
        try:
            s = dlg.result_spectrum(self.session.reader_options)
        except (PellucidError, OSError) as exc:
            show_error(self, "Reference correction not applied", exc)
            return
        self.session.set_spectrum(s, path=self.session.spectrum_path,
                                  reader_options=self.session.reader_options,
                                  reference=dlg.reference())
        self.fit_panel.reset_progress()
        self.status("Reference correction applied")

    # drag and drop
    def dragEnterEvent(self, event):
        if event.mimeData().hasUrls():
            event.acceptProposedAction()

    def dropEvent(self, event):
        urls = [u.toLocalFile() for u in event.mimeData().urls() if u.isLocalFile()]
        if not urls:
            return
        event.acceptProposedAction()
        path = urls[0]
        if path.endswith(".pellucid.json"):
            self.open_project(path)
        elif path.endswith(".recipe.json"):
            self.load_recipe(path)
        else:
            self.open_spectrum(path, ask=None)

    # -- fit -------------------------------------------------------------------------------
    def _busy(self, what: str) -> bool:
        if self.fit_job is not None and self.fit_job.is_running():
            self.status(f"A fit is running; cancel it (Esc) before {what}.", True)
            return True
        return False

    def start_suggestion(self) -> bool:
        """Fit the plausible film models and rank them by BIC (the "Suggest a model" button)."""
        return self.start_fit(suggest=True)

    def start_fit(self, suggest: bool | None = None) -> bool:
        """Start a fit in the worker thread.

        ``suggest`` None follows the recipe option ``fit.suggest_model`` (as a
        batch would); True runs a model suggestion (its list of models, if the
        option holds one), False fits the stack's own model only.
        """
        if self._busy("starting another"):
            return False
        try:
            spectrum, stack, options = self.session.fit_inputs()
            recipe = self.session.recipe(name="interactive fit")
            want = recipe.suggest_model if suggest is None else (
                (recipe.suggest_model or True) if suggest else False)
            if want and not recipe.suggest_model:
                # The provenance names the recipe that reproduces this result in a batch.
                recipe = dataclasses.replace(recipe, suggest_model=True)
            # What the result will be judged against: the recipe and setup it ran with.
            self._fit_origin = (recipe.hash(), self.session.setup_fingerprint())
        except PellucidError as exc:
            show_error(self, "Fit not started", exc)
            return False
        self._suggesting = bool(want)
        self._last_suggestion = None
        families = want if isinstance(want, tuple) else None

        def target(stop, report):
            if want:
                return suggest_model(spectrum, stack, options, families=families,
                                     progress=report, stop=stop)
            return fit_spectrum(spectrum, stack, options, progress=report, stop=stop)

        job = Job(target, parent=self)
        job.progress.connect(self.fit_panel.show_progress)
        job.succeeded.connect(self._fit_done)
        job.failed.connect(self._fit_failed)
        job.done.connect(self._fit_ended)
        self.fit_job = job
        self._set_running(True)
        self.status("Fitting the candidate models… (Esc to cancel)" if want
                    else "Fitting… (Esc to cancel)")
        job.start()
        return True

    def _set_running(self, running: bool):
        self.fit_panel.set_running(running)
        for box in self.boxes[:2]:
            box.setEnabled(not running)
        self.act_fit.setEnabled(not running)
        self.act_suggest.setEnabled(not running)
        # The fit works on a copy and writes its result back at the end: no stack edits
        # (and no undo of them) meanwhile. QUndoStack re-enables these on its next change.
        self.act_undo.setEnabled(not running and self.session.undo.canUndo())
        self.act_redo.setEnabled(not running and self.session.undo.canRedo())

    def cancel(self):
        if self.fit_job is not None and self.fit_job.is_running():
            self.fit_job.cancel()
            self.fit_panel.stage.setText("Stopping…")
            self.fit_panel.progress.setFormat("stopping…")
            self.status("Stopping the fit…")
        elif self.batch_dialog is not None and self.batch_dialog.is_running():
            self.batch_dialog.cancel()

    _fit_origin = ("", None)
    _suggesting = False
    _last_suggestion = None

    def _fit_done(self, result):
        if isinstance(result, Suggestion):
            self._suggestion_done(result)
            return
        rhash, setup = self._fit_origin
        self.session.set_result(result, recipe_hash=rhash, setup=setup)
        if result.aborted:
            self.status("Fit stopped; the best result so far is shown (not applied to the "
                        "stack).", True)
        elif not result.success:
            self.status(f"The fit did not converge: {result.message}", True)
        elif self.session.result_stale:
            self.status(f"Fit done, but {self.session.stale_reason} changed while it ran: "
                        "the result is marked out of date. Fit again (Ctrl+R).", True)
        else:
            try:
                d, sd = result.thickness()
                self.status(f"Fit done: thickness {format_pm(d, sd, 'nm')}, reduced χ² "
                            f"{result.redchi:.3g}")
            except KeyError:
                self.status(f"Fit done: reduced χ² {result.redchi:.3g}")

    def _suggestion_done(self, s: Suggestion):
        """Show the ranking; the chosen model's fit becomes the result. A chosen model
        that is not the user's is offered for adoption, not put into the stack."""
        self._last_suggestion = s
        r = s.result
        if r is None:
            self.status("The model suggestion stopped before any model was fitted; nothing "
                        "changed.", True)
            return
        if "model_suggestion" not in r.extra:
            # Stopped before any model could be ranked: the result still says so.
            r = dataclasses.replace(r, extra={**r.extra, "model_suggestion": s.to_dict()})
        chosen = s.chosen_candidate
        rhash, setup = self._fit_origin
        self.session.set_result(r, apply=chosen.current, recipe_hash=rhash, setup=setup)
        self.results.show_models()
        label = chosen.label
        if s.stopped:
            msg = (f"Model suggestion stopped: not every model was fitted; {label} is the "
                   "best of those that were.")
        elif chosen.current:
            msg = f"Model suggestion: your model, {label}, fits best; its fit is applied."
        else:
            msg = (f"Model suggestion: {label} fits best. Press 'Use {label} in the stack' "
                   "(Result, Models tab) to adopt it.")
        self.status(msg, s.stopped or self.session.result_stale)

    def adopt_suggested_model(self):
        """Put the suggested model, with its fitted values, into the stack (undoable)."""
        r = self.session.result
        info = (r.extra or {}).get("model_suggestion") if r is not None else None
        label = next((c.get("label") for c in (info or {}).get("candidates", [])
                      if c.get("model") == (info or {}).get("chosen")), "the suggested model")
        if self._busy("changing the stack"):
            return
        try:
            self.session.adopt_result_stack(f"Use {label} (suggested)")
        except PellucidError as exc:
            show_error(self, "Model not adopted", exc)
            return
        self.status(f"{label} and its fitted values are now in the stack (Ctrl+Z undoes it).")

    def _fit_failed(self, exc):
        what = "model suggestion" if self._suggesting else "fit"
        show_error(self, f"The {what} could not run", exc)
        self.status(f"{what.capitalize()} failed: {exc}", True)

    def _fit_ended(self):
        self._set_running(False)
        r = self.session.result
        s = self._last_suggestion
        if s is not None:
            fitted = [c for c in s.candidates if c.result is not None]
            text = (f"{'stopped' if s.stopped else 'done'}: {len(fitted)} models fitted, "
                    f"{sum(c.elapsed_s for c in fitted):.1f} s")
            self.fit_panel.stage.setText(text)
            self.fit_panel.progress.setFormat(text)
            self.fit_panel.progress.setValue(1000)
        elif r is not None:
            text = (f"{'stopped' if r.aborted else 'done'}: {r.nfev} model evaluations, "
                    f"{r.elapsed_s:.1f} s")
            self.fit_panel.stage.setText(text)
            self.fit_panel.progress.setFormat(text)
            self.fit_panel.progress.setValue(1000)
        else:
            self.fit_panel.progress.setFormat("idle")

    # -- export, project, recipe -------------------------------------------------------------
    def export_dialog(self):
        """Ask which parts to write and where (the Export result… menu entry)."""
        if self.session.result is None:
            show_error(self, "Nothing to export", "There is no fit result yet. Press Fit "
                       "first (Ctrl+R).")
            return
        if not self._confirm_stale_export():
            return
        from .export_dialog import ExportDialog
        recipe = self.session.recipe()
        dlg = ExportDialog(self.folder("export"), self.settings, self,
                           parts=recipe.exports, plot_formats=recipe.plot_formats)
        if dlg.exec() != ExportDialog.Accepted:
            return
        self._interactive_export = True
        try:
            self.export_to(dlg.folder(), parts=dlg.parts(), plots=dlg.plot_formats())
        finally:
            self._interactive_export = False

    _interactive_export = False

    def _confirm_stale_export(self) -> bool:
        """Ask before exporting a result the setup no longer matches (True: go on)."""
        s = self.session
        if not s.result_stale:
            return True
        return ask_yes_no(
            self, "Export an out-of-date result?",
            f"This result is out of date: {s.stale_reason} changed after the fit.\n\n"
            "The files will describe the fit as it was run (its recipe hash), not the "
            "current setup. To export the current setup, press Cancel and fit again "
            "(Ctrl+R).\n\nExport the old result anyway?")

    def export_to(self, out_dir, *, parts=None, plots=None) -> list:
        """Write the result's files into ``out_dir`` (default parts: the recipe's)."""
        from fitting.export import make_provenance, export_result
        r = self.session.result
        if r is None:
            return []
        recipe = self.session.recipe(name="interactive fit")
        stem = Path(self.session.spectrum_path).stem if self.session.spectrum_path else (
            (r.spectrum or {}).get("name") or "spectrum")
        stem = (r.spectrum or {}).get("name") or stem
        try:
            prov = make_provenance(r, recipe_hash=self.session.result_recipe_hash or None,
                                   recipe_name=recipe.name)
            if self.session.reference:
                prov["reference_correction"] = self._reference_note()
            if self.session.result_stale:
                prov["note"] = (f"result out of date when exported: {self.session.stale_reason} "
                                "changed after the fit")
            files = export_result(r, out_dir, stem=stem, provenance=prov,
                                  plots=tuple(recipe.plot_formats if plots is None else plots),
                                  parts=tuple(recipe.exports if parts is None else parts))
        except (PellucidError, OSError, ValueError) as exc:
            show_error(self, "Export failed", exc)
            return []
        self._remember_folder("export", out_dir)
        self.status(f"Exported {len(files)} files to {out_dir}")
        if self.isVisible() and self._interactive_export:
            show_info(self, "Export done", f"{len(files)} files written to {out_dir}.",
                      details="\n".join(str(f) for f in files))
        return files

    def _reference_note(self) -> str:
        ref = self.session.reference or {}
        txt = f"(S - D) / (B - D), B = {ref.get('baseline')}"
        if ref.get("dark"):
            txt += f", D = {ref.get('dark')}"
        return txt

    def _project_object(self):
        from fitting.project import Project, Reference, StoredResult
        s = self.session
        project = Project(s.recipe(name="app session"))
        if s.spectrum_path and Path(s.spectrum_path).is_file():
            project.add_spectrum(s.spectrum_path)
            if s.reference:
                project.reference = Reference.of(s.reference["baseline"],
                                                 s.reference.get("dark") or None,
                                                 raw_counts=s.reference.get("raw_counts", True))
        r = s.result
        if r is not None:
            from fitting.batch import summary_row
            project.result = StoredResult(r, s.result_recipe_hash, not s.result_stale)
            sha = (r.spectrum or {}).get("sha256", "") or ""
            project.results.append(summary_row(
                r, project.recipe, index=0, path=(r.spectrum or {}).get("source")
                or s.spectrum_path, sha256=sha, rhash=s.result_recipe_hash,
                status="ok" if r.success else "failed",
                reason="" if r.success else r.message))
        return project

    def save_project(self, ask: bool = False) -> bool:
        path = self.session.project_path
        if ask or not path:
            path, _ = QFileDialog.getSaveFileName(self, "Save project", self.folder("project"),
                                                  PROJECT_FILTER)
            if not path:
                return False
            if not path.endswith(".json"):
                path += ".pellucid.json"
        return self.save_project_to(path)

    def save_project_to(self, path) -> bool:
        from fitting.project import save_project
        try:
            save_project(self._project_object(), path)
        except (PellucidError, OSError, ValueError) as exc:
            show_error(self, "Project not saved", exc)
            return False
        self.session.project_path = str(path)
        self.session.mark_saved()
        self._remember_folder("project", path)
        self._update_title()
        self.status(f"Project saved to {path}")
        return True

    def open_project_dialog(self):
        path, _ = QFileDialog.getOpenFileName(self, "Open a project", self.folder("project"),
                                              PROJECT_FILTER)
        if path:
            self.open_project(path)

    def open_project(self, path) -> bool:
        """Open a project: its setup, spectrum (corrected as saved) and stored result."""
        from fitting.project import load_project
        from .reference_dialog import read_with_reference
        if self._busy("opening a project"):
            return False
        try:
            project = load_project(path)
        except (PellucidError, OSError) as exc:
            show_error(self, f"Could not open project {Path(path).name}", exc)
            return False
        s = self.session
        s.apply_recipe(project.recipe, "Open project")
        s.undo.clear()
        problems = project.check_spectra()
        reference = None
        if project.reference is not None:
            ref = project.reference
            reference = {"baseline": str(ref.baseline.path),
                         "dark": str(ref.dark.path) if ref.dark else "",
                         "raw_counts": ref.raw_counts}
        s.project_path = str(path)
        if project.spectra:
            spec_ref = project.spectra[0]
            try:
                spec = read_with_reference(spec_ref.path, s.reader_options, reference)
            except (PellucidError, OSError) as exc:
                show_error(self, "The project's spectrum could not be read", exc)
            else:
                s.set_spectrum(spec, path=str(spec_ref.path), reader_options=s.reader_options,
                               reference=reference)
        if project.result is not None:
            stored = project.result
            s.set_result(stored.fit, apply=False, recipe_hash=stored.recipe_hash,
                         current=stored.current and not problems)
        else:
            s.set_result(None)
        self.fit_panel.reset_progress()
        if problems:
            show_error(self, "Project opened with warnings", "\n".join(problems))
        s.mark_saved()
        self._remember_folder("project", path)
        self._update_title()
        if project.result is not None:
            self.status(f"Project {Path(path).name} opened with its stored result.")
        else:
            self.status(f"Project {Path(path).name} opened. Press Fit to fit.")
        return True

    def save_recipe_dialog(self):
        path, _ = QFileDialog.getSaveFileName(self, "Save setup as recipe",
                                              self.folder("recipe"), RECIPE_FILTER)
        if not path:
            return
        if not path.endswith(".json"):
            path += ".recipe.json"
        self.save_recipe_to(path)

    def save_recipe_to(self, path) -> bool:
        """Save the setup as a recipe (with what a loaded recipe had beyond the app's
        controls); reference files inside the recipe's folder are named relative to it."""
        from fitting.recipe import save_recipe
        path = Path(path)
        try:
            save_recipe(self.session.recipe(name=path.name.split(".")[0],
                                            relative_to=path.parent), path)
        except (PellucidError, OSError) as exc:
            show_error(self, "Recipe not saved", exc)
            return False
        self._remember_folder("recipe", path)
        self.status(f"Recipe saved to {path}")
        return True

    def load_recipe_dialog(self):
        path, _ = QFileDialog.getOpenFileName(self, "Load a recipe", self.folder("recipe"),
                                              RECIPE_FILTER)
        if path:
            self.load_recipe(path)

    def load_recipe(self, path) -> bool:
        from fitting.recipe import load_recipe
        if self._busy("loading a recipe"):
            return False
        try:
            recipe = load_recipe(path)
        except (PellucidError, OSError) as exc:
            show_error(self, f"Could not load recipe {Path(path).name}", exc)
            return False
        self.session.apply_recipe(recipe, f"Load recipe {Path(path).name}")
        self._remember_folder("recipe", path)
        self.status(f"Recipe {Path(path).name} loaded")
        return True

    # -- batch -------------------------------------------------------------------------------
    def batch(self):
        from .batch_dialog import BatchDialog
        if self.batch_dialog is None:
            self.batch_dialog = BatchDialog(self.session, input_dir=self.folder("batch_in"),
                                            output_dir=self.folder("batch_out"), parent=self)
            self.batch_dialog.start_button.clicked.connect(self._remember_batch_folders)
        self.batch_dialog.show()
        self.batch_dialog.raise_()
        return self.batch_dialog

    def _remember_batch_folders(self):
        d = self.batch_dialog
        if d.input_edit.text():
            self.settings.setValue("folders/batch_in", d.input_edit.text())
        if d.output_edit.text():
            self.settings.setValue("folders/batch_out", d.output_edit.text())

    # -- close -------------------------------------------------------------------------------
    def closeEvent(self, event):
        if self.session.is_modified():
            answer = ask_save_discard_cancel(
                self, "Save changes?",
                "The project has changes that are not saved (setup, reference correction "
                "or fit result).\n\nSave them before closing?")
            if answer == "cancel" or (answer == "save" and not self.save_project()):
                event.ignore()
                return
        self.shutdown_jobs()
        self.save_settings()
        super().closeEvent(event)

    def shutdown_jobs(self):
        """Cancel and join any worker (tests and close)."""
        for job in (self.fit_job, getattr(self.batch_dialog, "job", None)):
            if job is not None and job.is_running():
                job.cancel()
                job.wait(60000)
        self.results.shutdown()
