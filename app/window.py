"""The main window: data -> model -> fit -> result, left to right.

Left column: the three steps "1 Spectrum", "2 Sample stack", "3 Fit". Centre:
the plot of measured and model spectra with residuals. Right: the result tabs.
The window wires panels to one :class:`~app.session.Session`, owns the menus,
shortcuts, settings and file dialogs, and starts the fit in a
:class:`~app.worker.Job`. It computes nothing itself.
"""

from __future__ import annotations

from pathlib import Path

from PySide6.QtCore import QSettings, Qt
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import (QApplication, QFileDialog, QGroupBox, QLabel, QMainWindow,
                               QMenu, QScrollArea, QSplitter, QVBoxLayout, QWidget)

from fitting.errors import PellucidError
from fitting.fit import fit_spectrum

from .dialogs import show_error, show_info
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
        scroll.setMinimumWidth(left.minimumSizeHint().width()
                               + scroll.verticalScrollBar().sizeHint().width() + 4)
        scroll.setHorizontalScrollBarPolicy(Qt.ScrollBarAlwaysOff)

        right = QGroupBox("4   Result")
        right.setStyleSheet(_BOX_STYLE)
        rl = QVBoxLayout(right)
        rl.setContentsMargins(4, 8, 4, 4)
        rl.addWidget(self.results)

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
        self.fit_panel.cancel_requested.connect(self.cancel)
        s.message.connect(self.status)
        s.undo.cleanChanged.connect(self._on_clean_changed)

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

    def show_shortcuts(self):
        show_info(self, "Keyboard shortcuts",
                  "Ctrl+O  open a spectrum\nCtrl+R or F5  fit\nEsc  cancel the fit or batch\n"
                  "Ctrl+E  export the result\nCtrl+S  save the project\n"
                  "Ctrl+Shift+O  open a project\nCtrl+B  batch fit a folder\n"
                  "Ctrl+Z / Ctrl+Shift+Z  undo / redo\nF1  this list")

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
        mark = "" if self.session.undo.isClean() else " *"
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

    def open_spectrum(self, path, *, options=None, ask: bool | None = False) -> bool:
        """Read a spectrum file into the session; on failure explain in a dialog.

        ``ask=None`` follows the user's "show the preview every time" setting,
        ``True`` always shows the import preview, ``False`` never does.
        """
        from fitting.reader import read_spectrum
        path = str(path)
        if self._busy("opening a spectrum"):
            return False
        if ask is None:
            ask = self._preview_every_time()
        try:
            if ask:
                from .import_dialog import ImportDialog
                dlg = ImportDialog(path, options or self.session.reader_options, self,
                                   show_every_time=self._preview_every_time())
                if dlg.exec() != ImportDialog.Accepted:
                    return False
                self.settings.setValue("show_import_preview", dlg.every_time.isChecked())
                options = dlg.options()
                spectrum = dlg.spectrum or read_spectrum(path, options=options)
            else:
                spectrum = read_spectrum(path, options=options)
        except (PellucidError, OSError) as exc:
            show_error(self, f"Could not open {Path(path).name}", exc)
            self.status(f"Not loaded: {exc}", True)
            return False
        self.session.set_spectrum(spectrum, path=path, reader_options=options)
        self._remember_folder("spectra", path)
        self._add_recent(path)
        self.status(f"Loaded {Path(path).name}: {len(spectrum)} points")
        for w in spectrum.warnings:
            self.status(f"{Path(path).name}: {w}", True)
        return True

    def reimport(self):
        if self.session.spectrum_path:
            self.open_spectrum(self.session.spectrum_path, options=self.session.reader_options,
                               ask=True)

    def reference_correction(self):
        from .reference_dialog import ReferenceDialog
        if not self.session.spectrum_path:
            return
        dlg = ReferenceDialog(self.session.spectrum_path, self.folder("spectra"), self)
        if dlg.exec() != ReferenceDialog.Accepted:
            return
        try:
            s = dlg.result_spectrum(self.session.reader_options)
        except (PellucidError, OSError) as exc:
            show_error(self, "Reference correction not applied", exc)
            return
        self.session.set_spectrum(s, path=self.session.spectrum_path,
                                  reader_options=self.session.reader_options)
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

    def start_fit(self) -> bool:
        if self._busy("starting another"):
            return False
        try:
            spectrum, stack, options = self.session.fit_inputs()
        except PellucidError as exc:
            show_error(self, "Fit not started", exc)
            return False

        def target(stop, report):
            return fit_spectrum(spectrum, stack, options, progress=report, stop=stop)

        job = Job(target, parent=self)
        job.progress.connect(self.fit_panel.show_progress)
        job.succeeded.connect(self._fit_done)
        job.failed.connect(self._fit_failed)
        job.done.connect(self._fit_ended)
        self.fit_job = job
        self._set_running(True)
        self.status("Fitting… (Esc to cancel)")
        job.start()
        return True

    def _set_running(self, running: bool):
        self.fit_panel.set_running(running)
        for box in self.boxes[:2]:
            box.setEnabled(not running)
        self.act_fit.setEnabled(not running)
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

    def _fit_done(self, result):
        self.session.set_result(result)
        if result.aborted:
            self.status("Fit stopped; the best result so far is shown (not applied to the "
                        "stack).", True)
        elif not result.success:
            self.status(f"The fit did not converge: {result.message}", True)
        else:
            try:
                d, sd = result.thickness()
                sd_txt = f" ± {sd:.1f}" if sd is not None else ""
                self.status(f"Fit done: thickness {d:.1f}{sd_txt} nm, reduced χ² "
                            f"{result.redchi:.3g}")
            except KeyError:
                self.status(f"Fit done: reduced χ² {result.redchi:.3g}")

    def _fit_failed(self, exc):
        show_error(self, "The fit could not run", exc)
        self.status(f"Fit failed: {exc}", True)

    def _fit_ended(self):
        self._set_running(False)
        r = self.session.result
        if r is not None:
            text = (f"{'stopped' if r.aborted else 'done'}: {r.nfev} model evaluations, "
                    f"{r.elapsed_s:.1f} s")
            self.fit_panel.stage.setText(text)
            self.fit_panel.progress.setFormat(text)
            self.fit_panel.progress.setValue(1000)
        else:
            self.fit_panel.progress.setFormat("idle")

    # -- export, project, recipe -------------------------------------------------------------
    def export_dialog(self):
        if self.session.result is None:
            show_error(self, "Nothing to export", "There is no fit result yet. Press Fit "
                       "first (Ctrl+R).")
            return
        d = QFileDialog.getExistingDirectory(self, "Export the result into folder",
                                             self.folder("export"))
        if d:
            self._interactive_export = True
            try:
                self.export_to(d)
            finally:
                self._interactive_export = False

    _interactive_export = False

    def export_to(self, out_dir) -> list:
        from fitting.export import make_provenance, export_result
        r = self.session.result
        if r is None:
            return []
        recipe = self.session.recipe(name="interactive fit")
        stem = Path(self.session.spectrum_path).stem if self.session.spectrum_path else (
            (r.spectrum or {}).get("name") or "spectrum")
        try:
            prov = make_provenance(r, recipe_hash=recipe.hash(), recipe_name=recipe.name)
            files = export_result(r, out_dir, stem=stem, provenance=prov,
                                  plots=tuple(recipe.plot_formats),
                                  parts=tuple(recipe.exports))
        except (PellucidError, OSError, ValueError) as exc:
            show_error(self, "Export failed", exc)
            return []
        self._remember_folder("export", out_dir)
        self.status(f"Exported {len(files)} files to {out_dir}")
        if self.isVisible() and self._interactive_export:
            show_info(self, "Export done", f"{len(files)} files written to {out_dir}.",
                      details="\n".join(str(f) for f in files))
        return files

    def _project_object(self):
        from fitting.project import Project
        project = Project(self.session.recipe(name="app session"))
        if self.session.spectrum_path and Path(self.session.spectrum_path).is_file():
            project.add_spectrum(self.session.spectrum_path)
        r = self.session.result
        if r is not None:
            from fitting.batch import summary_row
            rec = project.recipe
            sha = (r.spectrum or {}).get("sha256", "") or ""
            project.results.append(summary_row(
                r, rec, index=0, path=self.session.spectrum_path, sha256=sha,
                rhash=rec.hash(), status="ok" if r.success else "failed",
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
        self.session.undo.setClean()
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
        from fitting.project import load_project
        from fitting.reader import read_spectrum
        if self._busy("opening a project"):
            return False
        try:
            project = load_project(path)
        except (PellucidError, OSError) as exc:
            show_error(self, f"Could not open project {Path(path).name}", exc)
            return False
        self.session.apply_recipe(project.recipe, "Open project")
        self.session.undo.clear()
        problems = project.check_spectra()
        if project.spectra:
            ref = project.spectra[0]
            try:
                spec = read_spectrum(ref.path, options=self.session.reader_options)
            except (PellucidError, OSError) as exc:
                show_error(self, "The project's spectrum could not be read", exc)
            else:
                self.session.set_spectrum(spec, path=str(ref.path),
                                          reader_options=self.session.reader_options)
        if problems:
            show_error(self, "Project opened with warnings", "\n".join(problems))
        self.session.project_path = str(path)
        self.session.undo.setClean()
        self._remember_folder("project", path)
        self._update_title()
        self.status(f"Project {Path(path).name} opened. Press Fit to refit.")
        return True

    def save_recipe_dialog(self):
        from fitting.recipe import save_recipe
        path, _ = QFileDialog.getSaveFileName(self, "Save setup as recipe",
                                              self.folder("recipe"), RECIPE_FILTER)
        if not path:
            return
        if not path.endswith(".json"):
            path += ".recipe.json"
        try:
            save_recipe(self.session.recipe(name=Path(path).name.split(".")[0]), path)
        except (PellucidError, OSError) as exc:
            show_error(self, "Recipe not saved", exc)
            return
        self._remember_folder("recipe", path)
        self.status(f"Recipe saved to {path}")

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
        for job in (self.fit_job, getattr(self.batch_dialog, "job", None)):
            if job is not None and job.is_running():
                job.cancel()
                job.wait(60000)
        self.save_settings()
        super().closeEvent(event)

    def shutdown_jobs(self):
        """Cancel and join any worker (tests and close)."""
        for job in (self.fit_job, getattr(self.batch_dialog, "job", None)):
            if job is not None and job.is_running():
                job.cancel()
                job.wait(60000)
