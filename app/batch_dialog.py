"""Batch run from the app: the current setup applied to every spectrum of a folder.

The runner is :func:`fitting.batch.iter_batch`, driven by one
:class:`app.worker.Job` (its generator steps arrive as signals); Cancel sets
the job's stop event, which the runner checks between spectra and inside
in-process fits. When the run ends, the summary table is shown.
"""

from __future__ import annotations

import os
from pathlib import Path

from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QBrush, QColor
from PySide6.QtWidgets import (QCheckBox, QDialog, QFileDialog, QFormLayout, QHBoxLayout,
                               QHeaderView, QLabel, QLineEdit, QProgressBar, QPushButton,
                               QSpinBox, QTableWidget, QTableWidgetItem, QVBoxLayout)

from .dialogs import show_error
from .result_panel import VERDICT_STYLE
from .worker import Job

__all__ = ["BatchDialog", "SUMMARY_COLUMNS"]

#: Columns of the summary shown in the app (all columns are in summary.csv).
SUMMARY_COLUMNS = ("file", "status", "verdict", "thickness", "thickness_sigma", "redchi",
                   "band_gap", "reason")
#: Status words: "fitted" rather than "ok", since a fitted spectrum's verdict (its own
#: column) may still say 'check' or 'poor'.
_STATUS_WORDS = {"ok": "fitted", "failed": "did not converge", "error": "error",
                 "stopped": "stopped"}


class BatchDialog(QDialog):
    """Choose input folder, output folder and workers; run; watch; read the summary."""

    finished_run = Signal(object)

    def __init__(self, session, *, input_dir: str = "", output_dir: str = "", parent=None):
        super().__init__(parent)
        self.setWindowTitle("Batch fit")
        self.session = session
        self.job: Job | None = None
        self.rows: list[dict] = []
        self.summary = None

        self.input_edit = QLineEdit(input_dir)
        self.input_edit.setToolTip("Folder holding the spectra to fit (CSV, TXT, DAT …)")
        self.output_edit = QLineEdit(output_dir)
        self.output_edit.setToolTip("Folder for the results: summary.csv, summary.json, "
                                    "report.pdf and one folder per spectrum")
        self.jobs = QSpinBox()
        self.jobs.setRange(1, max(1, os.cpu_count() or 1))
        self.jobs.setValue(1)
        self.jobs.setToolTip("How many spectra to fit at once (1 = in this program; more "
                             "uses separate processes)")
        self.resume = QCheckBox("Skip spectra already done with this setup")
        self.resume.setToolTip("Resume a stopped run: spectra whose results exist for the same "
                               "recipe and unchanged file are not fitted again")
        self.start_button = QPushButton("Start batch")
        self.start_button.setToolTip("Fit every spectrum in the input folder with the current "
                                     "stack and fit options")
        self.start_button.clicked.connect(self.start)
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setToolTip("Stop after the spectrum being fitted; finished results "
                                      "are kept (Esc)")
        self.cancel_button.setEnabled(False)
        self.cancel_button.clicked.connect(self.cancel)
        self.close_button = QPushButton("Close")
        self.close_button.setToolTip("Close this window")
        self.close_button.clicked.connect(self.close)
        self.progress = QProgressBar()
        self.progress.setFormat("%v of %m spectra")
        self.progress.setToolTip("Spectra finished")
        self.progress.setValue(0)
        self.state = QLabel("Choose the folders and press Start batch.")
        self.state.setWordWrap(True)
        self.table = QTableWidget(0, len(SUMMARY_COLUMNS))
        self.table.setHorizontalHeaderLabels(["File", "Status", "Verdict", "Thickness (nm)",
                                              "± σ (nm)", "Reduced χ²", "Band gap (eV)",
                                              "Reason"])
        self.table.verticalHeader().setVisible(False)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        self.table.setEditTriggers(QTableWidget.NoEditTriggers)
        self.table.setToolTip("One row per spectrum as it finishes; the full table is "
                              "summary.csv in the output folder")

        form = QFormLayout()
        for label, edit, title in (("Spectra folder:", self.input_edit, "Folder with spectra"),
                                   ("Results folder:", self.output_edit, "Folder for results")):
            row = QHBoxLayout()
            row.addWidget(edit, 1)
            b = QPushButton("Browse…")
            b.setToolTip(f"Choose the {label.lower().rstrip(':')}")
            b.clicked.connect(lambda _=False, e=edit, t=title: self._browse(e, t))
            row.addWidget(b)
            form.addRow(label, row)
        form.addRow("Parallel fits:", self.jobs)
        form.addRow("", self.resume)
        buttons = QHBoxLayout()
        buttons.addWidget(self.start_button)
        buttons.addWidget(self.cancel_button)
        buttons.addStretch(1)
        buttons.addWidget(self.close_button)
        intro = QLabel("Fits every spectrum in the folder with the current sample stack and "
                       "fit options, one after another, and writes each result as soon as it "
                       "is done. A file that cannot be read is listed with the reason; the "
                       "others go on.")
        intro.setWordWrap(True)
        self.open_results = QPushButton("Open results folder")
        self.open_results.setToolTip("Show the results folder in the file manager")
        self.open_results.setEnabled(False)
        self.open_results.clicked.connect(self._open_results)
        buttons.insertWidget(2, self.open_results)
        lay = QVBoxLayout(self)
        lay.addWidget(intro)
        lay.addLayout(form)
        lay.addLayout(buttons)
        lay.addWidget(self.progress)
        lay.addWidget(self.state)
        lay.addWidget(self.table, 1)
        self.resize(900, 560)

    def _browse(self, edit, title):
        d = QFileDialog.getExistingDirectory(self, title, edit.text())
        if d:
            edit.setText(d)

    # -- run ------------------------------------------------------------------------------
    def start(self) -> bool:
        from fitting.batch import iter_batch
        from fitting.errors import PellucidError
        src, out = self.input_edit.text().strip(), self.output_edit.text().strip()
        if not src or not Path(src).is_dir():
            show_error(self, "Batch not started", f"The spectra folder {src!r} does not exist.")
            return False
        if not out:
            show_error(self, "Batch not started", "Choose a results folder.")
            return False
        try:
            recipe = self.session.recipe(name="batch from the app")
        except PellucidError as exc:
            show_error(self, "Batch not started", exc)
            return False
        jobs, resume = self.jobs.value(), self.resume.isChecked()
        self.rows = []
        self.summary = None
        self.table.setRowCount(0)
        self.progress.setValue(0)
        self.progress.setMaximum(1)
        self.state.setText("Starting…")

        def target(stop, _report):
            return iter_batch([src], recipe, out, jobs=jobs, resume=resume, stop=stop)

        self.job = Job(target, parent=self)
        self.job.stepped.connect(self._on_step)
        self.job.succeeded.connect(self._on_done)
        self.job.failed.connect(self._on_failed)
        self.job.done.connect(self._on_end)
        self.start_button.setEnabled(False)
        self.cancel_button.setEnabled(True)
        self.job.start()
        return True

    def cancel(self):
        if self.job is not None and self.job.is_running():
            self.job.cancel()
            self.state.setText("Stopping after the current spectrum…")

    def is_running(self) -> bool:
        return self.job is not None and self.job.is_running()

    def _on_step(self, step):
        self.progress.setMaximum(max(step.total, 1))
        self.progress.setValue(step.done or len(self.rows) + 1)
        self.rows.append(step.row)
        self._add_row(step.row)
        word = "skipped (done before)" if step.skipped else _STATUS_WORDS.get(step.status,
                                                                             step.status)
        self.state.setText(f"{Path(step.path).name}: {word}")

    def _add_row(self, row: dict):
        thick_key = next((k for k in row if k.endswith("_thickness")), None)
        vals = {"file": Path(str(row.get("file", ""))).name, "status":
                _STATUS_WORDS.get(row.get("status"), row.get("status")),
                "thickness": row.get(thick_key) if thick_key else None,
                "thickness_sigma": row.get(f"{thick_key}_sigma") if thick_key else None,
                "redchi": row.get("redchi"), "band_gap": row.get("band_gap"),
                "verdict": row.get("verdict") or "",
                # A fitted spectrum's reason is why its verdict is not 'good'.
                "reason": row.get("reason") or (row.get("verdict_reasons") or "")}
        i = self.table.rowCount()
        self.table.insertRow(i)
        for j, key in enumerate(SUMMARY_COLUMNS):
            v = vals[key]
            if isinstance(v, float):
                txt = f"{v:.4g}" if key in ("redchi",) else f"{v:.2f}"
            else:
                txt = "" if v is None else str(v)
            if key == "verdict" and v:
                # Symbol and words carry the meaning; the colour only helps.
                sym, colour, words = VERDICT_STYLE.get(v, ("•", "", v))
                it = QTableWidgetItem(f"{sym} {v}")
                it.setToolTip(words)
                if colour:
                    it.setForeground(QBrush(QColor(colour)))
            else:
                it = QTableWidgetItem(txt)
            if key == "reason" and txt:
                it.setToolTip(txt.replace("; ", "\n"))
            if isinstance(v, float):
                it.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
            self.table.setItem(i, j, it)

    def _on_done(self, summary):
        self.summary = summary
        if summary is None:
            self.state.setText("Batch ended.")
            return
        counts = ", ".join(f"{v} {_STATUS_WORDS.get(k, k)}" for k, v in summary.counts.items()
                           if v)
        verdicts = ", ".join(f"{v} {k}" for k, v in (summary.verdicts or {}).items() if v)
        if verdicts:
            counts += f" (verdicts: {verdicts})"
        stopped = " (stopped early)" if summary.stopped else ""
        self.state.setText(f"Batch finished{stopped} in {summary.elapsed_s:.1f} s: "
                           f"{counts or 'nothing to do'}. Summary table: {summary.summary_csv}")
        self.progress.setMaximum(max(summary.total, 1))
        self.progress.setValue(summary.total if not summary.stopped else len(self.rows))
        self.open_results.setEnabled(True)
        self.finished_run.emit(summary)

    def _open_results(self):
        from PySide6.QtCore import QUrl
        from PySide6.QtGui import QDesktopServices
        QDesktopServices.openUrl(QUrl.fromLocalFile(self.output_edit.text().strip()))

    def _on_failed(self, exc):
        self.state.setText(f"Batch stopped by an error: {exc}")
        show_error(self, "Batch stopped", exc)

    def _on_end(self):
        self.start_button.setEnabled(True)
        self.cancel_button.setEnabled(False)

    def closeEvent(self, event):
        if self.is_running():
            self.cancel()
            self.job.wait(60000)
        super().closeEvent(event)

    def keyPressEvent(self, event):
        if event.key() == Qt.Key_Escape and self.is_running():
            self.cancel()
            return
        super().keyPressEvent(event)
