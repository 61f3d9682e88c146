"""Reference correction: sample signal ratioed against a 100 % line, dark subtracted.

The arithmetic is :func:`fitting.reference.reference_correct`; this module only
picks the files (:class:`ReferenceFields`, used here and in the import preview)
and reads them with :func:`fitting.reader.read_spectrum`. The files chosen are
kept by the session as ``{"baseline": path, "dark": path, "raw_counts": bool}``
(:func:`reference_dict`), saved in projects and applied again whenever the sample
is read again.
"""

from __future__ import annotations

from pathlib import Path

from PySide6.QtCore import Signal
from PySide6.QtWidgets import (QCheckBox, QDialog, QDialogButtonBox, QFileDialog, QFormLayout,
                               QHBoxLayout, QLabel, QLineEdit, QPushButton, QVBoxLayout,
                               QWidget)

from fitting.reader import ReaderOptions, read_spectrum
from fitting.reference import reference_correct

__all__ = ["ReferenceDialog", "ReferenceFields", "corrected_spectrum", "read_with_reference",
           "is_counts", "describe_reference"]

_FILTER = "Spectra (*.csv *.txt *.dat *.tsv *.asc *.prn *.sp);;All files (*)"


def corrected_spectrum(sample_path: str, baseline_path: str, dark_path: str = "",
                       *, raw_counts: bool = True, options: ReaderOptions | None = None):
    """Read the three files and return the corrected spectrum (raises PellucidError)."""
    from dataclasses import replace
    opts = options or ReaderOptions()
    if raw_counts:
        opts = replace(opts, y_kind="counts")
    sample = read_spectrum(sample_path, options=opts)
    baseline = read_spectrum(baseline_path, options=opts)
    dark = read_spectrum(dark_path, options=opts) if dark_path else None
    return reference_correct(sample, baseline, dark)


def read_with_reference(path, options=None, reference: dict | None = None):
    """The spectrum of ``path`` as the session uses it: corrected if ``reference`` is given."""
    if not reference:
        return read_spectrum(path, options=options)
    return corrected_spectrum(str(path), reference["baseline"], reference.get("dark") or "",
                              raw_counts=reference.get("raw_counts", True), options=options)


def is_counts(spectrum) -> bool:
    """True if the reader found raw detector counts (not yet a T or R)."""
    return (spectrum.metadata or {}).get("ordinate") == "counts"


def describe_reference(reference: dict | None) -> str:
    """One line for the spectrum panel: which files corrected the spectrum."""
    if not reference:
        return ""
    txt = f"÷ 100 % line {Path(reference['baseline']).name}"
    if reference.get("dark"):
        txt += f", − dark {Path(reference['dark']).name}"
    return txt


class ReferenceFields(QWidget):
    """The 100 % line and dark file choosers and the raw-counts tick box.

    Signals
    -------
    changed() : a file or the tick box changed
    """

    changed = Signal()

    def __init__(self, reference: dict | None = None, start_dir: str = "", parent=None):
        super().__init__(parent)
        self._dir = start_dir
        reference = reference or {}
        self.baseline = QLineEdit(reference.get("baseline", ""))
        self.baseline.setPlaceholderText("signal with nothing in the beam")
        self.baseline.setToolTip("Signal measured with nothing in the beam (100 % line), or "
                                 "from the reference mirror for reflectance")
        self.dark = QLineEdit(reference.get("dark", "") or "")
        self.dark.setPlaceholderText("optional: signal with the beam blocked")
        self.dark.setToolTip("Signal with the beam blocked (leave empty for none)")
        self.raw = QCheckBox("Files hold raw detector counts")
        self.raw.setChecked(reference.get("raw_counts", True))
        self.raw.setToolTip("Tick when all three files are raw signals, not already T or R")
        form = QFormLayout(self)
        form.setContentsMargins(0, 0, 0, 0)
        for label, edit in (("100 % line:", self.baseline), ("Dark:", self.dark)):
            row = QHBoxLayout()
            row.addWidget(edit, 1)
            b = QPushButton("Browse…")
            b.setToolTip("Choose the file")
            b.clicked.connect(lambda _=False, e=edit: self._browse(e))
            row.addWidget(b)
            form.addRow(label, row)
            edit.editingFinished.connect(self.changed)
        form.addRow("", self.raw)
        self.raw.toggled.connect(self.changed)

    def _browse(self, edit):
        path, _ = QFileDialog.getOpenFileName(self, "Choose a file", self._dir, _FILTER)
        if path:
            edit.setText(path)
            self.changed.emit()

    def reference(self) -> dict | None:
        """``{"baseline", "dark", "raw_counts"}``, or None if no 100 % line is chosen."""
        base = self.baseline.text().strip()
        if not base:
            return None
        return {"baseline": base, "dark": self.dark.text().strip(),
                "raw_counts": self.raw.isChecked()}


class ReferenceDialog(QDialog):
    """Pick the 100 % line (baseline) and an optional dark signal for the loaded sample."""

    def __init__(self, sample_path: str, start_dir: str = "", parent=None, *,
                 reference: dict | None = None):
        super().__init__(parent)
        self.setWindowTitle("Reference correction")
        self.sample_path = sample_path
        self.fields = ReferenceFields(reference, start_dir, self)
        self.baseline, self.dark, self.raw = (self.fields.baseline, self.fields.dark,
                                              self.fields.raw)
        buttons = QDialogButtonBox(QDialogButtonBox.Ok | QDialogButtonBox.Cancel)
        buttons.button(QDialogButtonBox.Ok).setText("Correct")
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        lay = QVBoxLayout(self)
        lay.addWidget(QLabel("T = (sample − dark) / (100 % line − dark), on the common "
                             "wavelength range."))
        lay.addWidget(QLabel(f"Sample: {sample_path}"))
        lay.addWidget(self.fields)
        lay.addWidget(buttons)
        self.resize(620, 200)

    def reference(self) -> dict | None:
        return self.fields.reference()

    def result_spectrum(self, options=None):
        ref = self.reference() or {"baseline": "", "dark": "", "raw_counts": True}
        return corrected_spectrum(self.sample_path, ref["baseline"], ref["dark"],
                                  raw_counts=ref["raw_counts"], options=options)
