"""The "Fit" section: what part of the spectrum to fit, geometry, extras, and the Fit button.

The fit itself runs in :class:`app.worker.Job`; this panel only shows its
progress and offers Cancel. "Suggest a model" beside Fit asks for a model
suggestion instead (:func:`fitting.suggest.suggest_model`: the plausible film
models fitted and ranked by BIC), run the same way. The options are written into the
:class:`~app.session.Session` (undoable), from which ``FitOptions`` are built.

"More settings" holds what most fits leave alone but some need: the film's
thickness non-uniformity over the light spot and the instrument's spectral
bandwidth (both properties of the stack, :class:`fitting.stack.Stack`), fitting
the angle, the fit's evaluation budget (``max_nfev``) and time limit, and the
recipe option ``fit.suggest_model`` (every Fit, here and in a batch, tries the
plausible film models and keeps the one the BIC prefers). It
opens by itself when one of them is not at its default, so a loaded recipe never
hides a setting that changes the fit.
"""

from __future__ import annotations

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (QCheckBox, QComboBox, QDoubleSpinBox, QFormLayout, QGridLayout,
                               QHBoxLayout, QLabel, QListWidget, QProgressBar, QPushButton,
                               QSpinBox, QToolButton, QVBoxLayout, QWidget)

from fitting.errors import PellucidError
from fitting.presets import default_fit_options

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
    fit_requested(), suggest_requested(), cancel_requested()
    status(str, bool)
    """

    fit_requested = Signal()
    suggest_requested = Signal()
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
            w.setSpecialValueText("–")       # shown with no spectrum, instead of "1.0 nm"
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
        self.fit_tilt = QCheckBox("Fit a tilt")
        self.fit_tilt.setToolTip("Let the fit tilt the 100 % line linearly across the range "
                                 "(a baseline that drifted during the scan)")
        self.fit_tilt.toggled.connect(lambda v: self._set("fit_tilt", v))
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

        # More settings ----------------------------------------------------------------
        self.spread = QDoubleSpinBox()
        self.spread.setRange(0.0, 30.0)
        self.spread.setDecimals(1)
        self.spread.setSingleStep(0.5)
        self.spread.setSuffix(" %")
        self.spread.setSpecialValueText("none (uniform)")
        self.spread.setKeyboardTracking(False)
        self.spread.setToolTip("How much the film thickness varies inside the light spot "
                               "(1σ, % of the thickness). Non-uniform films show weaker "
                               "fringes than the model; typical 0-3 %.")
        self.spread.valueChanged.connect(
            lambda v: self._set_stack("thickness_spread", v / 100.0))
        self.fit_spread = QComboBox()
        # "auto" (the engine decides from the data) is offered where FitOptions has it.
        if default_fit_options().get("fit_spread") == "auto":
            self.fit_spread.addItem("fit when the data ask", "auto")
        self.fit_spread.addItem("always fit it", True)
        self.fit_spread.addItem("keep it fixed", False)
        self.fit_spread.setToolTip("Whether the fit adjusts the thickness non-uniformity "
                                   "(starting from the value beside) or keeps it fixed")
        self.fit_spread.currentIndexChanged.connect(
            lambda _i: self._set("fit_spread", self.fit_spread.currentData()))
        self.bandwidth = QDoubleSpinBox()
        self.bandwidth.setRange(0.0, 50.0)
        self.bandwidth.setDecimals(1)
        self.bandwidth.setSingleStep(0.5)
        self.bandwidth.setSuffix(" nm")
        self.bandwidth.setSpecialValueText("ideal (0 nm)")
        self.bandwidth.setKeyboardTracking(False)
        self.bandwidth.setToolTip("Spectral bandwidth (slit width, FWHM) of the "
                                  "spectrophotometer. It smooths fine fringes of thick "
                                  "films; see the instrument settings of the measurement.")
        self.bandwidth.valueChanged.connect(lambda v: self._set_stack("bandwidth_nm", v))
        self.fit_angle = QCheckBox("Fit the angle of incidence")
        self.fit_angle.setToolTip("Let the fit adjust the angle of incidence (when the "
                                  "sample holder's tilt is not known well)")
        self.fit_angle.toggled.connect(lambda v: self._set("fit_angle", v))
        self.max_nfev = QSpinBox()
        self.max_nfev.setRange(100, 10_000_000)
        self.max_nfev.setSingleStep(5000)
        self.max_nfev.setGroupSeparatorShown(True)
        self.max_nfev.setSuffix(" evaluations")
        self.max_nfev.setKeyboardTracking(False)
        self.max_nfev.setToolTip("Evaluation budget (max_nfev): how many model spectra the "
                                 "whole fit may compute. Raise it when a fit stops with "
                                 "'budget used up' or advice says 'raise max_nfev'.")
        self.max_nfev.valueChanged.connect(lambda v: self._set("max_nfev", int(v)))
        self.time_limit = QDoubleSpinBox()
        self.time_limit.setRange(1.0, 86400.0)
        self.time_limit.setDecimals(0)
        self.time_limit.setSingleStep(30.0)
        self.time_limit.setSuffix(" s")
        self.time_limit.setKeyboardTracking(False)
        self.time_limit.setToolTip("Time limit (time_limit_s): the fit stops after this "
                                   "many seconds and shows the best result so far")
        self.time_limit.valueChanged.connect(lambda v: self._set("time_limit_s", float(v)))
        self.suggest_option = QCheckBox("Every fit tries other film models")
        self.suggest_option.setToolTip(
            "Saved in recipes (fit.suggest_model), so batch runs do the same: every fit also "
            "fits the film models that suit the spectrum and keeps the one the BIC prefers. "
            "Each spectrum then takes 3-4 fits.")
        self.suggest_option.toggled.connect(self._on_suggest_option)
        self.more_button = QToolButton()
        self.more_button.setText("More settings")
        self.more_button.setCheckable(True)
        self.more_button.setArrowType(Qt.RightArrow)
        self.more_button.setToolButtonStyle(Qt.ToolButtonTextBesideIcon)
        self.more_button.setToolTip("Thickness non-uniformity, instrument bandwidth, "
                                    "evaluation budget and time limit")
        self.more_button.toggled.connect(self._show_more)
        self.more = QWidget()
        more = QFormLayout(self.more)
        more.setContentsMargins(0, 0, 0, 0)
        more.setFieldGrowthPolicy(QFormLayout.AllNonFixedFieldsGrow)
        # One control per row: the left column stays narrow with the section open.
        more.addRow("Thickness non-uniformity:", self.spread)
        more.addRow("", self.fit_spread)
        more.addRow("Instrument bandwidth:", self.bandwidth)
        more.addRow("", self.fit_angle)
        more.addRow("Evaluation budget:", self.max_nfev)
        more.addRow("Time limit:", self.time_limit)
        more.addRow("Model choice:", self.suggest_option)
        self.more.setVisible(False)

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
        self.suggest_button = QPushButton("Suggest a model")
        self.suggest_button.setToolTip(
            "Not sure which model suits this film? Fits your model and the others that suit "
            "the spectrum (Cauchy, Sellmeier, Tauc-Lorentz, …), ranks them by BIC and says "
            "which one fits best and why. Takes one fit per model.")
        self.suggest_button.setMinimumHeight(32)
        self.suggest_button.clicked.connect(self.suggest_requested)
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
        extras = QGridLayout()
        extras.setContentsMargins(0, 0, 0, 0)
        extras.addWidget(self.fit_scale, 0, 0)
        extras.addWidget(self.fit_offset, 0, 1)
        extras.addWidget(self.fit_tilt, 1, 0)
        form.addRow("Corrections:", extras)
        form.addRow("Start:", self.method)
        form.addRow("Band gap:", self.band_gap)
        masks = QHBoxLayout()
        masks.addWidget(self.mask_list, 1)
        masks.addWidget(self.unmask_button)
        form.addRow("Masked:", masks)
        run = QHBoxLayout()
        run.addWidget(self.fit_button, 2)
        run.addWidget(self.suggest_button, 2)
        run.addWidget(self.cancel_button, 1)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addLayout(form)
        lay.addLayout(run)
        lay.addWidget(self.progress)
        lay.addWidget(self.stage)
        # Below Fit, so opening it never pushes the Fit button out of sight.
        lay.addWidget(self.more_button)
        lay.addWidget(self.more)
        # Shown only where the fit engine has the option (set once it has a parent).
        self.fit_tilt.setHidden("fit_tilt" not in session.options)

        session.options_changed.connect(self.refresh)
        session.masks_changed.connect(self.refresh)
        session.spectrum_changed.connect(self.refresh)
        session.stack_changed.connect(self.refresh)
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
            else:                                 # nothing to show: "–", not "1.0 nm"
                self.range_lo.setValue(self.range_lo.minimum())
                self.range_hi.setValue(self.range_hi.minimum())
            self.range_lo.setEnabled(rng is not None)
            self.range_hi.setEnabled(rng is not None)
            self.angle.setValue(o.get("angle_deg", 0.0))
            self.polarization.setCurrentIndex(self.polarization.findData(o.get("polarization",
                                                                               "u")))
            self.polarization.setEnabled(o.get("angle_deg", 0.0) > 0)
            self.fit_scale.setChecked(bool(o.get("fit_scale")))
            self.fit_offset.setChecked(bool(o.get("fit_offset")))
            self.fit_tilt.setChecked(bool(o.get("fit_tilt")))
            i = self.method.findData(o.get("method", "auto"))
            if i < 0:
                self.method.addItem(o.get("method"), o.get("method"))
                i = self.method.findData(o.get("method"))
            self.method.setCurrentIndex(i)
            bg = o.get("band_gap") or "none"
            self.band_gap.setCurrentIndex(self.band_gap.findData(bg))
            st = self.session.stack
            self.spread.setValue(100.0 * st.thickness_spread)
            self.bandwidth.setValue(st.bandwidth_nm)
            v = o.get("fit_spread", False)
            i = next((j for j in range(self.fit_spread.count())
                      if self.fit_spread.itemData(j) == v
                      and type(self.fit_spread.itemData(j)) is type(v)), -1)
            if i < 0:                            # a value this menu does not list
                self.fit_spread.addItem(str(v), v)
                i = self.fit_spread.count() - 1
            self.fit_spread.setCurrentIndex(i)
            self.fit_angle.setChecked(bool(o.get("fit_angle")))
            self.max_nfev.setValue(int(o.get("max_nfev", self.max_nfev.value())))
            self.time_limit.setValue(float(o.get("time_limit_s", self.time_limit.value())))
            want = o.get("suggest_model", False)
            self.suggest_option.setChecked(bool(want))
            if isinstance(want, tuple):
                from fitting.presets import MODEL_CHOICES
                names = ", ".join(MODEL_CHOICES.get(k, k).split(" (")[0] for k in want)
                self.suggest_option.setText(f"Every fit also tries: {names}")
            else:
                self.suggest_option.setText("Every fit tries other film models")
            self.fit_button.setText("Fit + choose model" if want else "Fit")
            if self._more_differs() and not self.more_button.isChecked():
                self.more_button.setChecked(True)
            self.mask_list.clear()
            for lo, hi in self.session.masks:
                self.mask_list.addItem(f"{lo:.1f} – {hi:.1f} nm")
            self.unmask_button.setEnabled(bool(self.session.masks))
            self.fit_button.setEnabled(s is not None and not self.cancel_button.isEnabled())
            self.suggest_button.setEnabled(self.fit_button.isEnabled())
        finally:
            self._updating = False

    def set_running(self, running: bool):
        self.cancel_button.setEnabled(running)
        self.fit_button.setEnabled(not running and self.session.spectrum is not None)
        self.suggest_button.setEnabled(self.fit_button.isEnabled())
        if running:
            self.progress.setValue(0)
            self.progress.setFormat("starting…")
            self.stage.setText("")

    def _more_differs(self) -> bool:
        """True if a setting under "More settings" is not at its default."""
        o, st, d = self.session.options, self.session.stack, default_fit_options()
        return bool(st.thickness_spread or st.bandwidth_nm or any(
            o.get(k) != d.get(k) for k in ("fit_spread", "fit_angle", "max_nfev",
                                           "time_limit_s")) or o.get("suggest_model"))

    def _show_more(self, on: bool):
        self.more.setVisible(on)
        self.more_button.setArrowType(Qt.DownArrow if on else Qt.RightArrow)

    def reset_progress(self):
        """Back to "idle" (a new spectrum or project: the last run's text no longer applies)."""
        self.progress.setValue(0)
        self.progress.setFormat("idle")
        self.progress.setToolTip("Progress of the running fit")
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

    def _on_suggest_option(self, on: bool):
        if self._updating:
            return
        # Ticking again after a recipe's list of models asks the data to decide.
        self._set("suggest_model", bool(on))

    def _set_stack(self, name, value):
        if self._updating:
            return
        try:
            self.session.set_stack_option(name, value)
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
