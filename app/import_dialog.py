"""Import preview: the first lines of a file, what the reader detected, and corrections.

The dialog shows the raw lines and the detected layout (separator, decimal
mark, columns, units, percent or fraction) from :func:`fitting.reader.preview`;
every detection can be overridden before the file is loaded. What the reader
chose without being told or left out (a column picked among several, skipped
lines with their numbers: :attr:`fitting.reader.Preview.notes`) is listed under
the detection, so nothing is dropped silently. The result is a
:class:`fitting.reader.ReaderOptions`, which is also what a recipe saves.

A file of raw detector counts is not a transmittance: the preview says so, and
Load stays off until a 100 % line (and optionally a dark signal) is chosen in the
reference-correction box, after which the corrected T is previewed and loaded.
The correction chosen is :meth:`ImportDialog.reference`.
"""

from __future__ import annotations

from html import escape

from PySide6.QtCore import Qt
from PySide6.QtGui import QFontDatabase
from PySide6.QtWidgets import (QCheckBox, QComboBox, QDialog, QDialogButtonBox, QFormLayout,
                               QGroupBox, QHBoxLayout, QLabel, QPlainTextEdit, QPushButton,
                               QSpinBox, QVBoxLayout)

from fitting.errors import PellucidError
from fitting.reader import ReaderOptions, preview

from .reference_dialog import ReferenceFields, describe_reference, is_counts, \
    read_with_reference

__all__ = ["ImportDialog"]

_DELIMS = {"auto": "detect", "\t": "tab", ";": "semicolon ;", ",": "comma ,",
           " ": "spaces"}
_DECIMALS = {"auto": "detect", ".": "point  (450.5)", ",": "comma  (450,5)"}
_X_UNITS = {"auto": "detect", "nm": "nm", "um": "µm", "A": "Å", "cm-1": "cm⁻¹ (wavenumber)",
            "eV": "eV (photon energy)"}
_Y_KINDS = {"auto": "detect", "T_percent": "Transmittance in %",
            "T_fraction": "Transmittance as fraction (0-1)", "R_percent": "Reflectance in %",
            "R_fraction": "Reflectance as fraction (0-1)", "absorbance": "Absorbance",
            "counts": "Raw detector counts (needs reference correction)"}


def _combo(choices: dict, current, tip: str) -> QComboBox:
    c = QComboBox()
    for k, label in choices.items():
        c.addItem(label, k)
    i = c.findData(current)
    c.setCurrentIndex(max(i, 0))
    c.setToolTip(tip)
    return c


class ImportDialog(QDialog):
    """Preview a spectrum file and correct the detection before loading it."""

    def __init__(self, path, options: ReaderOptions | None = None, parent=None,
                 *, show_every_time: bool = True, reference: dict | None = None,
                 start_dir: str = ""):
        super().__init__(parent)
        self.setWindowTitle("Import spectrum — check how the file is read")
        self.path = str(path)
        self.spectrum = None
        opts = options or ReaderOptions()

        self.lines = QPlainTextEdit()
        self.lines.setReadOnly(True)
        self.lines.setFont(QFontDatabase.systemFont(QFontDatabase.FixedFont))
        self.lines.setLineWrapMode(QPlainTextEdit.NoWrap)
        self.lines.setToolTip("The first lines of the file exactly as stored")
        self.detected = QLabel("")
        self.detected.setWordWrap(True)
        self.detected.setTextFormat(Qt.RichText)
        self.result_label = QLabel("")
        self.result_label.setWordWrap(True)

        self.delimiter = _combo(_DELIMS, opts.delimiter, "What separates the columns")
        self.decimal = _combo(_DECIMALS, opts.decimal, "The decimal mark of the numbers")
        self.x_column = QSpinBox()
        self.x_column.setRange(0, 99)
        self.x_column.setSpecialValueText("detect")
        self.x_column.setValue(opts.x_column + 1 if isinstance(opts.x_column, int) else 0)
        self.x_column.setToolTip("Column holding wavelength (or energy, wavenumber); 1 = first")
        self.y_column = QSpinBox()
        self.y_column.setRange(0, 99)
        self.y_column.setSpecialValueText("detect")
        self.y_column.setValue(opts.y_column + 1 if isinstance(opts.y_column, int) else 0)
        self.y_column.setToolTip("Column holding the measured values; 1 = first")
        self.x_unit = _combo(_X_UNITS, opts.x_unit, "Unit of the abscissa column")
        self.y_kind = _combo(_Y_KINDS, opts.y_kind, "What the values are: T or R, in % or "
                                                    "as a fraction, or absorbance")
        for w in (self.delimiter, self.decimal, self.x_unit, self.y_kind):
            w.currentIndexChanged.connect(self.update_preview)
        for w in (self.x_column, self.y_column):
            w.valueChanged.connect(self.update_preview)
        self.every_time = QCheckBox("Show this preview every time a file is opened")
        self.every_time.setChecked(show_every_time)
        self.every_time.setToolTip("Untick to load files directly with automatic detection "
                                   "(you can still open this preview from the Spectrum menu)")

        form = QFormLayout()
        form.addRow("Column separator:", self.delimiter)
        form.addRow("Decimal mark:", self.decimal)
        cols = QHBoxLayout()
        cols.addWidget(QLabel("wavelength"))
        cols.addWidget(self.x_column)
        cols.addWidget(QLabel("values"))
        cols.addWidget(self.y_column)
        cols.addStretch(1)
        form.addRow("Columns:", cols)
        form.addRow("Abscissa unit:", self.x_unit)
        form.addRow("Values are:", self.y_kind)
        box = QGroupBox("Corrections (leave at 'detect' if the summary above is right)")
        box.setLayout(form)
        self.ref_fields = ReferenceFields(reference, start_dir, self)
        self.ref_fields.changed.connect(self.update_preview)
        self.ref_box = QGroupBox("Reference correction, for raw signals only (leave empty for "
                                 "a T or R file)")
        self.ref_box.setToolTip("T = (sample − dark) / (100 % line − dark). For raw detector "
                                "signals: choose the 100 % line measured with nothing in the "
                                "beam, and the dark signal if you have one")
        rl = QVBoxLayout(self.ref_box)
        rl.addWidget(self.ref_fields)

        self.buttons = QDialogButtonBox(QDialogButtonBox.Ok | QDialogButtonBox.Cancel)
        self.buttons.button(QDialogButtonBox.Ok).setText("Load")
        self.buttons.button(QDialogButtonBox.Ok).setToolTip("Load the spectrum as shown")
        self.buttons.accepted.connect(self.accept)
        self.buttons.rejected.connect(self.reject)
        reset = QPushButton("Back to detection")
        reset.setToolTip("Set every correction back to automatic detection")
        reset.clicked.connect(self._reset)
        self.buttons.addButton(reset, QDialogButtonBox.ResetRole)

        lay = QVBoxLayout(self)
        lay.addWidget(QLabel(f"<b>{self.path}</b>"))
        lay.addWidget(self.lines, 1)
        lay.addWidget(self.detected)
        lay.addWidget(box)
        lay.addWidget(self.ref_box)
        lay.addWidget(self.result_label)
        lay.addWidget(self.every_time)
        lay.addWidget(self.buttons)
        self.resize(760, 720)
        self.update_preview()

    def _reset(self):
        for w in (self.delimiter, self.decimal, self.x_unit, self.y_kind):
            w.setCurrentIndex(0)
        self.x_column.setValue(0)
        self.y_column.setValue(0)

    def options(self) -> ReaderOptions:
        """The reader options chosen (raises RecipeError on an impossible combination)."""
        col = lambda spin: None if spin.value() == 0 else spin.value() - 1  # noqa: E731
        return ReaderOptions(x_column=col(self.x_column), y_column=col(self.y_column),
                             x_unit=self.x_unit.currentData(), y_kind=self.y_kind.currentData(),
                             delimiter=self.delimiter.currentData(),
                             decimal=self.decimal.currentData())

    def update_preview(self, *_):
        ok = self.buttons.button(QDialogButtonBox.Ok)
        try:
            opts = self.options()
            pv = preview(self.path, 25, options=opts)
        except PellucidError as exc:
            self.detected.setText(f"<span style='color:#d9480f'><b>Cannot read:</b> {exc}</span>")
            self.result_label.setText("")
            self.spectrum = None
            ok.setEnabled(False)
            return
        self.lines.setPlainText("\n".join(pv.lines))
        if pv.dialect is None:
            self.detected.setText(f"<span style='color:#d9480f'><b>Not readable as it is:"
                                  f"</b> {pv.problem}</span><br>Correct the settings below.")
            self.result_label.setText("")
            self.spectrum = None
            ok.setEnabled(False)
            return
        detected = "<b>Detected:</b> " + escape(pv.dialect.describe())
        if pv.notes:
            items = "".join(f"<li>{escape(str(n))}</li>" for n in pv.notes)
            detected += (f"<br><b>Notes from reading the file:</b>"
                         f"<ul style='margin:0'>{items}</ul>")
        self.detected.setText(detected)
        reference = self.reference()
        try:
            s = read_with_reference(self.path, opts, reference)
        except PellucidError as exc:
            what = "Reference correction failed: " if reference else ""
            self.result_label.setText(f"<span style='color:#d9480f'>{what}{exc}</span>")
            self.spectrum = None
            ok.setEnabled(False)
            return
        wl = s.wavelength_nm
        if is_counts(s):
            self.spectrum = None
            self.result_label.setText(
                f"<span style='color:#d9480f'><b>Raw detector counts, not a transmittance:"
                f"</b></span> {len(s)} points, {wl[0]:.1f}–{wl[-1]:.1f} nm, values "
                f"{s.values.min():.4g}–{s.values.max():.4g} counts. Choose the 100 % line "
                f"(and the dark signal) below to turn them into T, or set 'Values are' if "
                f"the detection is wrong.")
            ok.setEnabled(False)
            ok.setToolTip("Raw counts cannot be fitted: choose the 100 % line below first")
            return
        self.spectrum = s
        q = {"T": "transmittance", "R": "reflectance"}.get(s.quantity, s.quantity)
        txt = (f"<b>Will load:</b> {len(s)} points of {q}, {wl[0]:.1f}–{wl[-1]:.1f} nm, "
               f"values {100 * s.values.min():.1f}–{100 * s.values.max():.1f} %.")
        if reference:
            txt += f"<br><b>Corrected:</b> {describe_reference(reference)}."
        more = [w for w in s.warnings if w not in pv.notes]     # the rest are listed above
        if more:
            txt += "<br><b>Notes:</b> " + escape("; ".join(more))
        self.result_label.setText(txt)
        ok.setEnabled(True)
        ok.setToolTip("Load the spectrum as shown")

    def reference(self) -> dict | None:
        """The reference correction chosen (None: load the file as read)."""
        return self.ref_fields.reference()
