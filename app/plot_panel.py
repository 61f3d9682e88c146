"""The central plot: measured spectrum, the model curve of the current stack, residuals.

The model curve follows every edit of the stack at once (it is one call of
:meth:`fitting.stack.Stack.RT` on the data grid, a few milliseconds). After a
fit the fitted curve is shown until the next edit. Masked windows are drawn
shaded; in "Mask" mode a drag across the plot adds one (matplotlib
``SpanSelector``), a right click on a shaded window removes it.

Session changes do not redraw at once: they schedule one rebuild on the next
turn of the event loop (:attr:`PlotPanel.pending`), so a fit result, which
changes the stack and the result together, costs one rebuild, not two. The
margins are fixed in pixels (:meth:`PlotPanel._apply_margins`) instead of a
constrained layout, which would measure every tick label on every draw (about
half of the drawing time).
"""

from __future__ import annotations

import numpy as np
from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg, NavigationToolbar2QT
from matplotlib.figure import Figure
from matplotlib.widgets import SpanSelector
from PySide6.QtCore import QTimer, Signal
from PySide6.QtWidgets import (QComboBox, QHBoxLayout, QLabel, QPushButton, QToolButton,
                               QVBoxLayout, QWidget)

from fitting.errors import PellucidError
from fitting.units import HC_EV_NM

from .theme import figure_colors, style_figure

__all__ = ["PlotPanel", "AXES"]

#: x-axis choices: key -> (label, nm -> x, x -> nm)
AXES = {
    "nm": ("Wavelength λ (nm)", lambda w: w, lambda x: x),
    "eV": ("Photon energy E (eV)", lambda w: HC_EV_NM / w, lambda x: HC_EV_NM / x),
    "cm-1": ("Wavenumber ν̃ (cm⁻¹)", lambda w: 1e7 / w, lambda x: 1e7 / x),
}
_QUANTITY = {"T": "Transmittance T (%)", "R": "Reflectance R (%)"}


class PlotPanel(QWidget):
    """Canvas with toolbar, x-axis chooser and mask mode, bound to a :class:`Session`.

    Signals
    -------
    cursor_text(str) : what lies under the mouse, for the status bar
    """

    cursor_text = Signal(str)

    def __init__(self, session, parent=None):
        super().__init__(parent)
        self.session = session
        self.axis = "nm"
        self._result_fresh = False
        self._model = None          # (wavelength_nm, model values) of the live curve
        self._model_error = ""

        self.figure = Figure(figsize=(6, 5))
        self.canvas = FigureCanvasQTAgg(self.figure)
        self.canvas.setToolTip("")
        self.ax, self.ax_res = self.figure.subplots(
            2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1]})
        self.pending = False            # a rebuild is scheduled
        self._pending_reset = False
        # Rebuilding the artists and rasterising them are two steps, each on a short
        # timer rather than a posted event: Qt would run posted events back to back,
        # while timers let input and paint events in between (one long stall becomes
        # two short ones).
        self._flush_timer = QTimer(self)
        self._flush_timer.setSingleShot(True)
        self._flush_timer.setInterval(5)
        self._flush_timer.timeout.connect(self._flush)
        self._draw_timer = QTimer(self)
        self._draw_timer.setSingleShot(True)
        self._draw_timer.setInterval(5)
        self._draw_timer.timeout.connect(self.canvas.draw)
        self.canvas.mpl_connect("resize_event", lambda _e: self._apply_margins())
        self._apply_margins()
        self.toolbar = NavigationToolbar2QT(self.canvas, self)
        self.toolbar.setToolTip("Zoom, pan, go back to the full view, save the picture")

        self.axis_combo = QComboBox()
        for key, (label, *_rest) in AXES.items():
            self.axis_combo.addItem(label.split(" (")[0], key)
        self.axis_combo.setSizeAdjustPolicy(QComboBox.AdjustToContents)
        self.axis_combo.setToolTip("Show the spectrum against wavelength, photon energy or "
                                   "wavenumber")
        self.axis_combo.currentIndexChanged.connect(self._on_axis)

        self.mask_button = QToolButton()
        self.mask_button.setText("Mask a window")
        self.mask_button.setCheckable(True)
        self.mask_button.setToolTip(
            "When on, drag across the plot to leave that wavelength window out of the fit "
            "(e.g. a detector change-over or a noisy band). Right-click a grey window to "
            "remove it.")
        self.mask_button.toggled.connect(self._on_mask_mode)
        self.clear_masks_button = QPushButton("Clear masks")
        self.clear_masks_button.setToolTip("Remove every masked window (can be undone)")
        self.clear_masks_button.clicked.connect(session.clear_masks)

        top = QHBoxLayout()
        top.addWidget(QLabel("x axis:"))
        top.addWidget(self.axis_combo)
        top.addSpacing(12)
        top.addWidget(self.mask_button)
        top.addWidget(self.clear_masks_button)
        top.addStretch(1)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addLayout(top)
        lay.addWidget(self.canvas, 1)
        lay.addWidget(self.toolbar)

        self.span = None
        self._make_span()
        self.canvas.mpl_connect("motion_notify_event", self._on_motion)
        self.canvas.mpl_connect("button_press_event", self._on_press)

        session.spectrum_changed.connect(self._on_data)
        session.stack_changed.connect(self._on_setup)
        session.options_changed.connect(self._on_setup)
        session.masks_changed.connect(self.schedule)
        session.result_changed.connect(self._on_result)
        session.result_stale_changed.connect(self._on_result)
        self.redraw()

    def _apply_margins(self):
        """Margins in pixels (room for tick labels, axis labels and the title)."""
        w, h = self.canvas.width() or 600, self.canvas.height() or 500
        left, right, top, bottom = 64.0, 14.0, 26.0, 44.0
        self.figure.subplots_adjust(left=min(left / w, 0.3), right=1 - min(right / w, 0.1),
                                    top=1 - min(top / h, 0.2), bottom=min(bottom / h, 0.3),
                                    hspace=min(30.0 / h * 4, 0.4))

    def schedule(self, reset_view: bool = False):
        """Redraw on the next turn of the event loop (several requests make one redraw)."""
        self._pending_reset |= bool(reset_view)
        if not self.pending:
            self.pending = True
            self._flush_timer.start()

    def _flush(self):
        if self.pending:
            reset, self.pending, self._pending_reset = self._pending_reset, False, False
            self.redraw(reset_view=reset)

    def _make_span(self):
        """(Re)create the drag selector: ``Axes.cla`` removes its artists on every redraw."""
        if self.span is not None:
            self.span.disconnect_events()
        self.span = SpanSelector(self.ax, self._on_span, "horizontal", useblit=True,
                                 props={"alpha": 0.25, "facecolor": "#8a8f98"},
                                 interactive=False, drag_from_anywhere=False)
        self.span.set_active(self.mask_button.isChecked())

    # -- reactions ----------------------------------------------------------------------
    def _on_data(self):
        self._result_fresh = self._fresh()
        self._update_model()
        self.schedule(reset_view=True)

    def _on_setup(self):
        self._result_fresh = self._fresh()
        self._update_model()
        self.schedule()

    def _on_result(self, *_):
        self._result_fresh = self._fresh()
        self.schedule()

    def _fresh(self) -> bool:
        """Show the fitted curve only while the result matches the setup."""
        s = self.session
        return s.result is not None and not s.result_stale and s.spectrum is not None and len(
            s.result.wavelength_nm) == len(s.spectrum)

    def _on_axis(self, _index):
        self.axis = self.axis_combo.currentData()
        self.redraw(reset_view=True)

    def set_axis(self, key: str) -> None:
        self.axis_combo.setCurrentIndex(list(AXES).index(key))

    def _on_mask_mode(self, on: bool):
        if on and self.toolbar.mode:
            # Leave zoom/pan so the drag goes to the span selector.
            if "zoom" in str(self.toolbar.mode):
                self.toolbar.zoom()
            else:
                self.toolbar.pan()
        self.span.set_active(on)

    def _on_span(self, x0, x1):
        if self.session.spectrum is None:
            return
        to_nm = AXES[self.axis][2]
        a, b = sorted((float(to_nm(x0)), float(to_nm(x1))))
        if b - a <= 0:
            return
        self.session.add_mask(a, b)

    def _on_press(self, event):
        if event.button != 3 or event.inaxes not in (self.ax, self.ax_res) or event.xdata is None:
            return
        wl = float(AXES[self.axis][2](event.xdata))
        for i, (lo, hi) in enumerate(self.session.masks):
            if lo <= wl <= hi:
                self.session.remove_mask(i)
                return

    def _on_motion(self, event):
        if event.inaxes is None or event.xdata is None:
            self.cursor_text.emit("")
            return
        x = event.xdata
        if not np.isfinite(x) or x <= 0:
            return
        wl = float(AXES[self.axis][2](x))
        parts = [f"λ = {wl:.1f} nm", f"E = {HC_EV_NM / wl:.3f} eV",
                 f"ν̃ = {1e7 / wl:.0f} cm⁻¹"]
        if event.inaxes is self.ax:
            parts.append(f"cursor {event.ydata:.2f} %")
        else:
            parts.append(f"residual {event.ydata:.3f} %")
        s = self.session.spectrum
        if s is not None and s.wavelength_nm[0] <= wl <= s.wavelength_nm[-1]:
            q = s.quantity
            parts.append(f"measured {q} = {100 * np.interp(wl, s.wavelength_nm, s.values):.2f} %")
            curve = self._shown_model()
            if curve is not None and curve[0][0] <= wl <= curve[0][-1]:
                parts.append(f"model {q} = {100 * np.interp(wl, curve[0], curve[1]):.2f} %")
        self.cursor_text.emit("    ".join(parts))

    # -- model --------------------------------------------------------------------------
    def _update_model(self):
        s = self.session.spectrum
        self._model, self._model_error = None, ""
        if s is None or len(s) == 0:
            return
        opts = self.session.options
        wl = s.wavelength_nm
        try:
            R, T = self.session.stack.RT(wl, angle_deg=opts.get("angle_deg", 0.0),
                                         polarization=opts.get("polarization", "u"))
        except PellucidError as exc:
            # An n, κ table may cover only the fit range (a known layer from an earlier
            # result): then the model is drawn where the fit uses it.
            rng = opts.get("fit_range_nm")
            sel = wl if rng is None else wl[(wl >= rng[0]) & (wl <= rng[1])]
            try:
                if rng is None or sel.size < 2:
                    raise exc
                R, T = self.session.stack.RT(sel, angle_deg=opts.get("angle_deg", 0.0),
                                             polarization=opts.get("polarization", "u"))
            except PellucidError as exc2:
                self._model_error = str(exc2)
                return
            wl = sel
        self._model = (wl, T if s.quantity == "T" else R)

    def _shown_model(self):
        r = self.session.result
        if self._result_fresh and r is not None:
            return r.wavelength_nm, r.fitted
        return self._model

    # -- drawing ------------------------------------------------------------------------
    def redraw(self, reset_view: bool = False):
        """Bring the plot up to date now (session changes go through :meth:`schedule`).

        The curves are kept as artists and only get new data: clearing the axes
        would make matplotlib rebuild every tick and label on the next draw, which
        costs more than the drawing itself.
        """
        self.pending = False
        s = self.session.spectrum
        if s is None:
            key = (self.axis, tuple(sorted(figure_colors().items())))
            if self._artists is None and key == self._empty_key:
                return                     # the empty view is already on show
            self._draw_empty()
            self._empty_key = key
        else:
            self._empty_key = None
            if self._artists is None:
                self._make_artists()
                reset_view = True
            self._update_artists(s, reset_view)
        if reset_view:
            self.toolbar.update()          # "Home" returns to this view
        style_figure(self.figure)
        self._draw_timer.start()

    _artists = None
    _empty_key = None

    def _draw_empty(self):
        ax, axr = self.ax, self.ax_res
        self._artists = None
        ax.cla()
        axr.cla()
        col = figure_colors()
        axr.set_xlabel(AXES[self.axis][0])
        axr.set_ylabel("Residual (%)")
        ax.set_ylabel("Transmittance T (%)")
        ax.text(0.5, 0.5, "No spectrum loaded.\n\nOpen a measured spectrum with "
                "File ▸ Open (Ctrl+O)\nor drop a file onto this window.",
                ha="center", va="center", transform=ax.transAxes, color=col["text"],
                fontsize=11)
        ax.set_xticks([])
        ax.set_yticks([])
        axr.set_yticks([])
        ax.set_autoscale_on(False)
        self._make_span()

    def _make_artists(self):
        """The lines, texts and grid of a plot with data (made once per spectrum view)."""
        ax, axr = self.ax, self.ax_res
        ax.cla()
        axr.cla()
        a = {}
        a["measured"], = ax.plot([], [], lw=1.2, label="measured")
        a["unused"], = ax.plot([], [], lw=1.0, ls=":", label="not fitted")
        a["model"], = ax.plot([], [], lw=1.4)
        a["residual"], = axr.plot([], [], lw=1.0)
        a["zero"] = axr.axhline(0.0, lw=0.8)
        a["error"] = ax.text(0.02, 0.03, "", transform=ax.transAxes, fontsize=8, wrap=True)
        a["spans"] = []
        a["legend_key"] = None
        self._artists = a
        ax.grid(True, lw=0.5, alpha=0.6)
        axr.grid(True, lw=0.5, alpha=0.6)
        self._make_span()

    def _update_artists(self, s, reset_view: bool):
        ax, axr, a = self.ax, self.ax_res, self._artists
        col = figure_colors()
        label, conv, _inv = AXES[self.axis]
        x = conv(s.wavelength_nm)
        y = 100 * s.values
        used = self.session.spectrum_for_fit().used
        if self.session.options.get("fit_range_nm"):
            lo, hi = self.session.options["fit_range_nm"]
            used = used & (s.wavelength_nm >= lo) & (s.wavelength_nm <= hi)
        a["measured"].set_data(x, np.where(used, y, np.nan))
        a["measured"].set_color(col["measured"])
        a["unused"].set_data(x, np.where(used, np.nan, y))
        a["unused"].set_color(col["unused"])
        a["unused"].set_visible(not used.all())
        curve = self._shown_model()
        is_fit = self._result_fresh and self.session.result is not None
        has_curve = curve is not None
        for k in ("model", "residual", "zero"):
            a[k].set_visible(has_curve)
        if has_curve:
            a["model"].set_data(conv(curve[0]), 100 * curve[1])
            a["model"].set_color(col["fitted"] if is_fit else col["model"])
            a["model"].set_label("fitted model" if is_fit else "model (current stack)")
            res = 100 * (s.values - np.interp(s.wavelength_nm, curve[0], curve[1]))
            a["residual"].set_data(x, np.where(used, res, np.nan))
            a["residual"].set_color(col["residual"])
            a["zero"].set_color(col["grid"])
        a["error"].set_text("" if has_curve or not self._model_error
                            else "Model curve not shown: " + self._model_error)
        a["error"].set_color(col["second"])
        for span in a["spans"]:
            span.remove()
        a["spans"] = [sp.axvspan(conv(lo), conv(hi), color=col["mask"], alpha=0.25, lw=0)
                      for lo, hi in self.session.masks for sp in (ax, axr)]
        axr.set_xlabel(label)
        axr.set_ylabel("Residual (%)")
        ax.set_ylabel(_QUANTITY.get(s.quantity, "Measured (%)"))
        ax.set_title(s.name or "spectrum", fontsize=10, loc="left", color=col["text"])
        for g in (ax, axr):
            for line in g.get_xgridlines() + g.get_ygridlines():
                line.set_color(col["grid"])
        shown = [h for h in (a["measured"], a["unused"], a["model"]) if h.get_visible()]
        key = tuple((h.get_label(), h.get_color()) for h in shown)   # colours: theme
        if key != a["legend_key"] or ax.get_legend() is None:
            ax.legend(handles=shown, loc="best", fontsize=8)
            a["legend_key"] = key
        # Residuals always fit their axis; the spectrum keeps the user's zoom unless
        # the data or the axis changed. Autoscaling is switched off afterwards: the
        # selector's hidden rectangle would otherwise stretch the view to x = 0.
        axr.set_autoscalex_on(False)       # x follows the spectrum axes (shared)
        axr.set_autoscaley_on(True)
        axr.relim(visible_only=True)
        axr.autoscale_view(scalex=False)
        if reset_view:
            ax.set_autoscale_on(True)
            ax.relim(visible_only=True)
            ax.autoscale_view()
            ax.get_xlim(), ax.get_ylim()
        ax.set_autoscale_on(False)

    def image_data(self):
        """What is plotted, for tests: dict with x, measured and model arrays."""
        s = self.session.spectrum
        curve = self._shown_model()
        return {"measured": None if s is None else s.values,
                "model": None if curve is None else curve[1]}
