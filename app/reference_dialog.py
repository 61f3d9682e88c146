"""Reference correction: sample signal ratioed against a 100 % line, dark subtracted.

The arithmetic is :func:`fitting.reference.reference_correct`; this dialog only
picks the files and reads them with :func:`fitting.reader.read_spectrum`.
"""

from __future__ import annotations

from PySide6.QtWidgets import (QCheckBox, QDialog, QDialogButtonBox, QFileDialog, QFormLayout,
                               QHBoxLayout, QLabel, QLineEdit, QPushButton, QVBoxLayout)

from fitting.reader import ReaderOptions, read_spectrum
from fitting.reference import reference_correct

__all__ = ["ReferenceDialog", "corrected_spectrum"]

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


class ReferenceDialog(QDialog):
    """Pick the 100 % line (baseline) and an optional dark signal for the loaded sample."""

    def __init__(self, sample_path: str, start_dir: str = "", parent=None):
        super().__init__(parent)
        self.setWindowTitle("Reference correction")
        self.sample_path = sample_path
        self._dir = start_dir
        self.baseline = QLineEdit()
        self.baseline.setToolTip("Signal measured with nothing in the beam (100 % line), or "
                                 "from the reference mirror for reflectance")
        self.dark = QLineEdit()
        self.dark.setToolTip("Signal with the beam blocked (leave empty for none)")
        self.raw = QCheckBox("Files hold raw detector counts")
        self.raw.setChecked(True)
        self.raw.setToolTip("Tick when all three files are raw signals, not already T or R")
        form = QFormLayout()
        form.addRow("Sample:", QLabel(sample_path))
        for label, edit in (("100 % line:", self.baseline), ("Dark (optional):", self.dark)):
            row = QHBoxLayout()
            row.addWidget(edit, 1)
            b = QPushButton("Browse…")
            b.setToolTip("Choose the file")
            b.clicked.connect(lambda _=False, e=edit: self._browse(e))
            row.addWidget(b)
            form.addRow(label, row)
        form.addRow("", self.raw)
        buttons = QDialogButtonBox(QDialogButtonBox.Ok | QDialogButtonBox.Cancel)
        buttons.button(QDialogButtonBox.Ok).setText("Correct")
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        lay = QVBoxLayout(self)
        lay.addWidget(QLabel("T = (sample − dark) / (100 % line − dark), on the common "
                             "wavelength range."))
        lay.addLayout(form)
        lay.addWidget(buttons)
        self.resize(620, 200)

    def _browse(self, edit):
        path, _ = QFileDialog.getOpenFileName(self, "Choose a file", self._dir, _FILTER)
        if path:
            edit.setText(path)

    def result_spectrum(self, options=None):
        return corrected_spectrum(self.sample_path, self.baseline.text().strip(),
                                  self.dark.text().strip(), raw_counts=self.raw.isChecked(),
                                  options=options)
