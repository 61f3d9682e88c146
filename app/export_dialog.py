"""Export of one fit: which files to write (tables, curves, JSON, report, figures, PDF) and where.

The parts are those of :func:`fitting.export.export_result`; the choice starts
from the recipe's ``outputs`` (plus the PDF report) and the last choice made is
remembered in the settings.
"""

from __future__ import annotations

from PySide6.QtWidgets import (QCheckBox, QDialog, QDialogButtonBox, QFileDialog, QFormLayout,
                               QGroupBox, QHBoxLayout, QLabel, QLineEdit, QPushButton,
                               QVBoxLayout)

__all__ = ["ExportDialog", "PART_LABELS"]

#: export part -> (label, tooltip)
PART_LABELS = {
    "pdf": ("PDF report (1–2 pages)", "Thickness ± σ, χ², warnings, parameters, fit and n, κ "
                                     "figures and where the result came from: the file to "
                                     "hand on"),
    "nk": ("n, κ, α tables (CSV)", "One table per film: n, κ and α with 1σ per wavelength"),
    "curves": ("Measured and fitted curves (CSV)", "Measured, fitted, residual and σ per "
                                                   "wavelength"),
    "json": ("Full result (JSON)", "Every parameter with σ, correlations, curves and "
                                   "provenance, for scripts and databases"),
    "report": ("Text report (TXT)", "The plain-text fit report shown in the Report tab"),
    "plots": ("Figures", "Fit, n κ α and (with a band gap) Tauc figures in the formats "
                         "ticked beside"),
}
_FORMATS = ("png", "svg", "pdf")


def _as_list(v) -> list[str] | None:
    if v is None:
        return None
    return [str(x) for x in ([v] if isinstance(v, str) else v) if str(x)]


class ExportDialog(QDialog):
    """Choose the export folder and parts; :meth:`parts`, :meth:`plot_formats`, :meth:`folder`."""

    def __init__(self, folder: str = "", settings=None, parent=None, *,
                 parts=("nk", "curves", "json", "report", "plots"), plot_formats=("png",)):
        super().__init__(parent)
        self.setWindowTitle("Export the result")
        self.settings = settings
        saved = _as_list(settings.value("export/parts")) if settings is not None else None
        saved_fmt = (_as_list(settings.value("export/plot_formats"))
                     if settings is not None else None)
        chosen = set(saved if saved is not None else [*parts, "pdf"])
        fmts = set(saved_fmt if saved_fmt is not None else plot_formats)

        self.folder_edit = QLineEdit(folder)
        self.folder_edit.setToolTip("The files are written into this folder, named after "
                                    "the spectrum")
        self.folder_edit.textChanged.connect(self._update)
        browse = QPushButton("Browse…")
        browse.setToolTip("Choose the folder")
        browse.clicked.connect(self._browse)
        row = QHBoxLayout()
        row.addWidget(self.folder_edit, 1)
        row.addWidget(browse)

        self.part_boxes: dict[str, QCheckBox] = {}
        box = QGroupBox("Files to write")
        form = QFormLayout(box)
        for key, (label, tip) in PART_LABELS.items():
            cb = QCheckBox(label)
            cb.setToolTip(tip)
            cb.setChecked(key in chosen)
            cb.toggled.connect(self._update)
            self.part_boxes[key] = cb
            if key == "plots":
                fr = QHBoxLayout()
                fr.addWidget(cb)
                self.format_boxes = {}
                for f in _FORMATS:
                    fb = QCheckBox(f.upper())
                    fb.setToolTip(f"Write the figures as {f.upper()}")
                    fb.setChecked(f in fmts)
                    fb.toggled.connect(self._update)
                    self.format_boxes[f] = fb
                    fr.addWidget(fb)
                fr.addStretch(1)
                form.addRow(fr)
            else:
                form.addRow(cb)

        self.summary = QLabel("")
        self.summary.setWordWrap(True)
        self.buttons = QDialogButtonBox(QDialogButtonBox.Ok | QDialogButtonBox.Cancel)
        self.buttons.button(QDialogButtonBox.Ok).setText("Export")
        self.buttons.accepted.connect(self._accept)
        self.buttons.rejected.connect(self.reject)

        lay = QVBoxLayout(self)
        lay.addWidget(QLabel("Folder:"))
        lay.addLayout(row)
        lay.addWidget(box)
        lay.addWidget(self.summary)
        lay.addWidget(self.buttons)
        self.resize(560, 360)
        self._update()

    def _browse(self):
        d = QFileDialog.getExistingDirectory(self, "Export the result into folder",
                                             self.folder_edit.text())
        if d:
            self.folder_edit.setText(d)

    def parts(self) -> tuple[str, ...]:
        return tuple(k for k, cb in self.part_boxes.items() if cb.isChecked())

    def plot_formats(self) -> tuple[str, ...]:
        return tuple(f for f, cb in self.format_boxes.items() if cb.isChecked())

    def folder(self) -> str:
        return self.folder_edit.text().strip()

    def _update(self, *_):
        for fb in self.format_boxes.values():
            fb.setEnabled(self.part_boxes["plots"].isChecked())
        ok = self.buttons.button(QDialogButtonBox.Ok)
        problem = ""
        if not self.folder():
            problem = "Choose a folder."
        elif not self.parts():
            problem = "Tick at least one kind of file."
        elif "plots" in self.parts() and not self.plot_formats():
            problem = "Tick a figure format (PNG, SVG or PDF), or untick Figures."
        ok.setEnabled(not problem)
        self.summary.setText(problem or f"{len(self.parts())} kinds of file will be written "
                                        "into the folder; existing files of the same "
                                        "spectrum are replaced.")

    def _accept(self):
        if self.settings is not None:
            self.settings.setValue("export/parts", list(self.parts()))
            self.settings.setValue("export/plot_formats", list(self.plot_formats()))
        self.accept()
