"""The "Fit" section: what part of the spectrum to fit, geometry, extras, and the Fit button.

The fit itself runs in :class:`app.worker.Job`; this panel only shows its
progress and offers Cancel. The options are written into the
:class:`~app.session.Session` (undoable), from which ``FitOptions`` are built.
"""

from __future__ import annotations

from PySide6.QtCore import Signal
from PySide6.QtWidgets import (QCheckBox, QComboBox, QDoubleSpinBox, QFormLayout, QHBoxLayout,
                               QLabel, QListWidget, QProgressBar, QPushButton, QVBoxLayout,
                               QWidget)

from fitting.errors import PellucidError

__all__ = ["FitPanel"]

_BAND_GAP = {"none": (None, "No band gap"), "direct": ("direct", "Tauc, direct gap"),
             "indirect": ("indirect", "Tauc, indirect gap")}
_POL = {"u": "Unpolarised", "s": "s (TE)", "p": "p (TM)"}
_METHODS = {"auto": "Automatic start (recommended)",
            "least_squares": "From the values in the table (local fit)",
            "differential_evolution": "Global search within the bounds (slow)"}


class FitPanel(QWidget):
    """Fit options, masked windows, the Fit / Cancel buttons and the progress bar.

    Signals
    -------
    fit_requested(), cancel_requested()
    status(str, bool)
    """

    fit_requested = Signal()
    cancel_requested = Signal()
    status = Signal(str, bool)

    def __init__(self, session, parent=None):
        super().__init__(parent)
        self.session = session
        self._updating = False

        self.whole_range = QCheckBox("All")
        self.whole_range.setToolTip("Fit every measured point (untick to fit only a range)")
        self.whole_range.toggled.connect(self._on_range)
        self.range_lo = QDoubleSpinBox()
        self.range_hi = QDoubleSpinBox()
        for w, tip in ((self.range_lo, "Shortest wavelength used in the fit"),
                       (self.range_hi, "Longest wavelength used in the fit")):
            w.setRange(1.0, 100000.0)
            w.setDecimals(1)
            w.setSuffix(" nm")
            w.setKeyboardTracking(False)
            w.setToolTip(tip)
            w.valueChanged.connect(self._on_range)
        self.angle = QDoubleSpinBox()
        self.angle.setRange(0.0, 89.0)
        self.angle.setDecimals(1)
        self.angle.setSuffix(" °")
        self.angle.setKeyboardTracking(False)
        self.angle.setToolTip("Angle of incidence of the light on the sample (0° = normal)")
        self.angle.valueChanged.connect(lambda v: self._set("angle_deg", v))
        self.polarization = QComboBox()
        for k, label in _POL.items():
            self.polarization.addItem(label, k)
        self.polarization.setToolTip("Polarisation of the light (matters only away from "
                                     "normal incidence)")
        self.polarization.currentIndexChanged.connect(
            lambda _i: self._set("polarization", self.polarization.currentData()))
        self.fit_scale = QCheckBox("Fit a scale factor")
        self.fit_scale.setToolTip("Let the fit multiply the model by a factor near 1 "
                                  "(corrects a 100 % line that drifted)")
        self.fit_scale.toggled.connect(lambda v: self._set("fit_scale", v))
        self.fit_offset = QCheckBox("Fit an offset")
        self.fit_offset.setToolTip("Let the fit add a small constant (corrects stray light or "
                                   "a dark level that was not subtracted)")
        self.fit_offset.toggled.connect(lambda v: self._set("fit_offset", v))
        self.band_gap = QComboBox()
        for k, (_v, label) in _BAND_GAP.items():
            self.band_gap.addItem(label, k)
        self.band_gap.setToolTip("After the fit, find the optical band gap from a Tauc plot "
                                 "of the fitted absorption")
        self.band_gap.currentIndexChanged.connect(
            lambda _i: self._set("band_gap", _BAND_GAP[self.band_gap.currentData()][0]))

        self.method = QComboBox()
        for k, label in _METHODS.items():
            self.method.addItem(label, k)
        self.method.setToolTip("Where the fit starts: 'automatic' finds the thickness from the "
                               "fringes first; 'from the values' refines what is in the table; "
                               "'global search' tries the whole range between the bounds")
        self.method.currentIndexChanged.connect(
            lambda _i: self._set("method", self.method.currentData()))

        self.mask_list = QListWidget()
        self.mask_list.setMaximumHeight(40)
        self.mask_list.setToolTip("Wavelength windows left out of the fit. Add one with "
                                  "'Mask a window' above the plot.")
        self.unmask_button = QPushButton("Remove mask")
        self.unmask_button.setToolTip("Put the selected window back into the fit")
        self.unmask_button.clicked.connect(self._unmask)

        self.fit_button = QPushButton("Fit")
        self.fit_button.setToolTip("Fit the model to the spectrum, starting from an automatic "
                                   "first guess (Ctrl+R or F5)")
        self.fit_button.setMinimumHeight(32)
        f = self.fit_button.font()
        f.setBold(True)
        f.setPointSizeF(f.pointSizeF() * 1.15)
        self.fit_button.setFont(f)
        self.fit_button.clicked.connect(self.fit_requested)
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setToolTip("Stop the running fit or batch (Esc)")
        self.cancel_button.setEnabled(False)
        self.cancel_button.clicked.connect(self.cancel_requested)
        self.progress = QProgressBar()
        self.progress.setRange(0, 1000)
        self.progress.setValue(0)
        self.progress.setTextVisible(True)
        self.progress.setFormat("idle")
        self.progress.setToolTip("Progress of the running fit")
        self.stage = QLabel("")
        self.stage.setWordWrap(True)
        self.stage.setVisible(False)

        form = QFormLayout()
        form.setFieldGrowthPolicy(QFormLayout.AllNonFixedFieldsGrow)
        rng = QHBoxLayout()
        rng.addWidget(self.whole_range)
        rng.addWidget(self.range_lo, 1)
        rng.addWidget(QLabel("to"))
        rng.addWidget(self.range_hi, 1)
        form.addRow("Fit range:", rng)
        geo = QHBoxLayout()
        geo.addWidget(self.angle)
        geo.addWidget(self.polarization)
        form.addRow("Incidence:", geo)
        extras = QHBoxLayout()
        extras.addWidget(self.fit_scale)
        extras.addWidget(self.fit_offset)
        form.addRow("Corrections:", extras)
        form.addRow("Start:", self.method)
        form.addRow("Band gap:", self.band_gap)
        masks = QHBoxLayout()
        masks.addWidget(self.mask_list, 1)
        masks.addWidget(self.unmask_button)
        form.addRow("Masked:", masks)
        run = QHBoxLayout()
        run.addWidget(self.fit_button, 2)
        run.addWidget(self.cancel_button, 1)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addLayout(form)
        lay.addLayout(run)
        lay.addWidget(self.progress)
        lay.addWidget(self.stage)

        session.options_changed.connect(self.refresh)
        session.masks_changed.connect(self.refresh)
        session.spectrum_changed.connect(self.refresh)
        self.refresh()

    # -- view -------------------------------------------------------------------------------
    def refresh(self):
        self._updating = True
        try:
            o = self.session.options
            s = self.session.spectrum
            rng = o.get("fit_range_nm")
            self.whole_range.setChecked(rng is None)
            if rng is not None:
                self.range_lo.setValue(rng[0])
                self.range_hi.setValue(rng[1])
            elif s is not None and len(s):
                self.range_lo.setValue(float(s.wavelength_nm[0]))
                self.range_hi.setValue(float(s.wavelength_nm[-1]))
            self.range_lo.setEnabled(rng is not None)
            self.range_hi.setEnabled(rng is not None)
            self.angle.setValue(o.get("angle_deg", 0.0))
            self.polarization.setCurrentIndex(self.polarization.findData(o.get("polarization",
                                                                               "u")))
            self.polarization.setEnabled(o.get("angle_deg", 0.0) > 0)
            self.fit_scale.setChecked(bool(o.get("fit_scale")))
            self.fit_offset.setChecked(bool(o.get("fit_offset")))
            i = self.method.findData(o.get("method", "auto"))
            if i < 0:
                self.method.addItem(o.get("method"), o.get("method"))
                i = self.method.findData(o.get("method"))
            self.method.setCurrentIndex(i)
            bg = o.get("band_gap") or "none"
            self.band_gap.setCurrentIndex(self.band_gap.findData(bg))
            self.mask_list.clear()
            for lo, hi in self.session.masks:
                self.mask_list.addItem(f"{lo:.1f} – {hi:.1f} nm")
            self.unmask_button.setEnabled(bool(self.session.masks))
            self.fit_button.setEnabled(s is not None and not self.cancel_button.isEnabled())
        finally:
            self._updating = False

    def set_running(self, running: bool):
        self.cancel_button.setEnabled(running)
        self.fit_button.setEnabled(not running and self.session.spectrum is not None)
        if running:
            self.progress.setValue(0)
            self.progress.setFormat("starting…")
            self.stage.setText("")

    def show_progress(self, p):
        frac = float(getattr(p, "fraction", 0.0) or 0.0)
        self.progress.setValue(int(1000 * min(max(frac, 0.0), 1.0)))
        stage = getattr(p, "stage", "")
        self.progress.setFormat(f"{stage}  %p%  ·  {getattr(p, 'nfev', 0)} evaluations")
        chi = getattr(p, "best_chisqr", None)
        msg = getattr(p, "message", "")
        txt = f"{getattr(p, 'nfev', 0)} model evaluations"
        if chi is not None and chi == chi:
            txt += f", best χ² so far {chi:.4g}"
        if msg:
            txt += f" — {msg}"
        self.stage.setText(txt)
        # The details sit in the bar's tooltip: the column has no room for another line.
        self.progress.setToolTip(txt)

    # -- edits ------------------------------------------------------------------------------
    def _set(self, name, value):
        if self._updating:
            return
        try:
            self.session.set_option(name, value)
        except PellucidError as exc:
            self.status.emit(str(exc), True)
            self.refresh()

    def _on_range(self, *_):
        if self._updating:
            return
        if self.whole_range.isChecked():
            self._set("fit_range_nm", None)
        else:
            self._set("fit_range_nm", (self.range_lo.value(), self.range_hi.value()))

    def _unmask(self):
        row = self.mask_list.currentRow()
        if row < 0 and self.session.masks:
            row = 0
        if row >= 0:
            self.session.remove_mask(row)
