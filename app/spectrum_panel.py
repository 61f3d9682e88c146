"""The "Spectrum" section: which file is loaded, what it holds, and how to change it.

A reference-corrected spectrum says so, with the 100 % line and dark files it was
divided by (the correction is part of the data the fit sees).
"""

from __future__ import annotations

from pathlib import Path

from html import escape

from PySide6.QtCore import Signal
from PySide6.QtWidgets import QHBoxLayout, QLabel, QPushButton, QToolButton, QVBoxLayout, QWidget

from .reference_dialog import describe_reference

__all__ = ["SpectrumPanel"]


class SpectrumPanel(QWidget):
    """Shows the loaded spectrum; buttons ask the window to open, preview or correct.

    Signals
    -------
    open_requested(), preview_requested(), reference_requested()
    """

    open_requested = Signal()
    preview_requested = Signal()
    reference_requested = Signal()

    def __init__(self, session, parent=None):
        super().__init__(parent)
        self.session = session
        self.info = QLabel("")
        self.info.setWordWrap(True)
        self.info.setToolTip("The measured spectrum the fit uses")
        self.open_button = QPushButton("Open spectrum…")
        self.open_button.setToolTip("Open a measured spectrum (CSV, TXT, DAT …) — Ctrl+O. "
                                    "You can also drop a file onto the window.")
        self.open_button.clicked.connect(self.open_requested)
        self.recent_button = QToolButton()
        self.recent_button.setText("Recent")
        self.recent_button.setPopupMode(QToolButton.InstantPopup)
        self.recent_button.setToolTip("Open one of the last spectra you used")
        self.preview_button = QPushButton("Import settings…")
        self.preview_button.setToolTip("Show how the file was read (columns, units, % or "
                                       "fraction) and correct it")
        self.preview_button.clicked.connect(self.preview_requested)
        self.reference_button = QPushButton("Reference correction…")
        self.reference_button.setToolTip("Correct a raw sample signal with a measured 100 % "
                                         "line (and optionally a dark signal)")
        self.reference_button.clicked.connect(self.reference_requested)

        row1 = QHBoxLayout()
        row1.addWidget(self.open_button, 1)
        row1.addWidget(self.recent_button)
        row2 = QHBoxLayout()
        row2.addWidget(self.preview_button)
        row2.addWidget(self.reference_button)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addLayout(row1)
        lay.addWidget(self.info)
        lay.addLayout(row2)
        session.spectrum_changed.connect(self.refresh)
        self.refresh()

    def refresh(self):
        s = self.session.spectrum
        has = s is not None
        self.preview_button.setEnabled(has and bool(self.session.spectrum_path))
        self.reference_button.setEnabled(has)
        ref = self.session.reference
        self.reference_button.setText("Change correction…" if ref else "Reference correction…")
        if not has:
            self.info.setText("<i>No spectrum loaded.</i>")
            self.info.setToolTip("The measured spectrum the fit uses")
            return
        wl = s.wavelength_nm
        q = {"T": "Transmittance", "R": "Reflectance"}.get(s.quantity, s.quantity)
        name = Path(self.session.spectrum_path).name if self.session.spectrum_path else s.name
        txt = (f"<b>{name}</b><br>{q}, {len(s)} points, {wl[0]:.0f}–{wl[-1]:.0f} nm")
        if s.sigma is not None:
            txt += ", with noise estimate"
        if ref:
            txt += f"<br>✓ <b>Reference-corrected</b>: {escape(describe_reference(ref))}"
            self.info.setToolTip("T = (sample − dark) / (100 % line − dark)\n100 % line: "
                                 f"{ref['baseline']}\ndark: {ref.get('dark') or 'none'}")
        else:
            self.info.setToolTip("The measured spectrum the fit uses, as read from the file")
        if s.warnings:
            txt += ("<br><span style='color:#d9480f'>⚠ " + escape("; ".join(s.warnings[:3]))
                    + "</span>")
        self.info.setText(txt)
