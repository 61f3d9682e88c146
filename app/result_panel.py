"""The "Result" area: summary, optical constants, Tauc plot, correlations, the report and,
after a model suggestion, the ranking of the models (:mod:`app.suggestion_view`).

Everything shown comes from the session's :class:`~fitting.result.FitResult`;
figures are drawn by :mod:`fitting.plots` (the same drawings as the exported PNG
and PDF), recoloured to the palette, in a worker thread and only for the tab on
show (:class:`_FigureTab`), so neither a new result nor opening a tab freezes
the window. A result the setup no longer matches is marked out of date in the
banner above the tabs (:attr:`ResultPanel.banner`), with what changed.
"""

from __future__ import annotations

import math
from html import escape

import numpy as np
from matplotlib.figure import Figure
from fitting.labels import format_pm, two_digits
from PySide6.QtCore import Qt, QTimer, Signal
from PySide6.QtGui import QFontDatabase, QImage, QPixmap
from PySide6.QtWidgets import (QHeaderView, QLabel, QPlainTextEdit, QSizePolicy, QTableWidget,
                               QTableWidgetItem, QTabWidget, QVBoxLayout, QWidget)

from .theme import apply_colors, figure_colors

__all__ = ["ResultPanel"]


def _pm(value, sigma, unit="", digits=2):
    # One value ± σ rule for the whole project (fitting.labels.format_pm).
    return format_pm(value, sigma, unit, fmt=f".{digits}f", no_sigma="(σ not estimated)")


#: verdict -> (symbol, colour, words); symbol and words carry the meaning, the
#: colour (Okabe-Ito blue, orange, vermillion) only helps.
VERDICT_STYLE = {"good": ("✔", "#0072B2", "good"),
            "check": ("⚠", "#B36B00", "check before use"),
            "poor": ("✖", "#D55E00", "poor: do not use as it is")}


def verdict_html(r) -> str:
    """The result's verdict line ("" if the result carries none)."""
    v = getattr(r, "verdict", None)
    if not v:
        return ""
    sym, colour, words = VERDICT_STYLE.get(str(v), ("•", "#555555", str(v)))
    reasons = "; ".join(escape(str(x)) for x in (getattr(r, "verdict_reasons", ()) or ()))
    return (f"<br><span style='color:{colour}'>{sym} <b>Verdict: {escape(words)}</b></span>"
            + (f" — {reasons}" if reasons else ""))


_NUISANCE = {"scale": "scale of the 100 % line", "offset": "offset (stray light)",
             "tilt": "tilt of the 100 % line",
             "angle_deg": "angle of incidence", "thickness_spread": "thickness spread"}


def _label(name: str, r) -> str:
    """``film_o1_E0`` -> ``film: term 1: E₀``; nuisance names (scale, offset) as they are."""
    from .param_table import pretty_name
    for layer in (r.stack or {}).get("layers", []):
        pre = f"{layer.get('name')}_"
        if name.startswith(pre):
            return f"{layer.get('name')}: {pretty_name(name[len(pre):])}"
    return _NUISANCE.get(name, name)


# -- drawing: plain matplotlib, no Qt, so it can run in a worker thread ------------------
def _finish(fig, col):
    apply_colors(fig, col)
    for ax in fig.axes:
        ax.grid(True, color=col["grid"], lw=0.5, alpha=0.6)
        for line in ax.get_lines():
            if line.get_color() in ("#000000", "black", "k"):
                line.set_color(col["text"])
        for t in ax.texts:
            t.set_color(col["text"])
    for t in fig.texts:
        t.set_color(col["text"])
    if getattr(fig, "_suptitle", None) is not None:
        fig._suptitle.set_color(col["text"])


def draw_optical(fig, r, col):
    """n, κ and α of the first film (:func:`fitting.plots.optical_figure`)."""
    from fitting.plots import optical_figure
    optical_figure(r, alpha=True, fig=fig)
    _finish(fig, col)


def draw_tauc(fig, r, col):
    """The Tauc plot, zoomed on the absorption edge."""
    from fitting.plots import tauc_figure
    tauc_figure(r, fig=fig)
    # Show the edge, not the whole transparent range: about 1 eV either side of Eg.
    ax = fig.axes[0]
    eg = r.band_gap.Eg_eV
    lo, hi = r.band_gap.fit_range_eV
    ys = [line.get_ydata() for line in ax.get_lines()[:1]]
    xs = [line.get_xdata() for line in ax.get_lines()[:1]]
    # ... but not past the data's highest photon energy (an empty strip says nothing).
    top_e = float(np.nanmax(xs[0])) + 0.05 if xs and len(xs[0]) else max(hi, eg) + 0.8
    ax.set_xlim(eg - 1.0, min(max(hi, eg) + 0.8, top_e))
    if ys and len(ys[0]):
        sel = (np.asarray(xs[0]) <= max(hi, eg) + 0.8)
        top = np.nanmax(np.asarray(ys[0], dtype=float)[sel]) if sel.any() else None
        if top is not None and np.isfinite(top) and top > 0:
            ax.set_ylim(0, 1.05 * top)
    _finish(fig, col)


def draw_correlations(fig, r, col):
    """Heat map of the correlation matrix of the fitted parameters."""
    ax = fig.subplots()
    c = np.asarray(r.correl, dtype=float)
    # aspect="auto": the cells fill the tall, narrow tab instead of a small square
    im = ax.imshow(c, vmin=-1, vmax=1, cmap="RdBu_r", aspect="auto")
    n_layers = len((r.stack or {}).get("layers", []))
    names = [v if v in _NUISANCE else
             (_label(v, r).split(": ", 1)[-1] if n_layers == 1 else _label(v, r))
             for v in r.var_names]
    ax.set_xticks(range(len(names)), names, rotation=60, ha="right", fontsize=8)
    ax.set_yticks(range(len(names)), names, fontsize=8)
    if len(names) <= 10:
        for i in range(len(names)):
            for j in range(len(names)):
                ax.text(j, i, f"{c[i, j]:.2f}", ha="center", va="center", fontsize=7,
                        color="#000000" if abs(c[i, j]) < 0.6 else "#ffffff")
    cb = fig.colorbar(im, ax=ax, orientation="horizontal", shrink=0.7, aspect=30,
                      location="bottom")
    cb.set_label("correlation (±1: not separable)", color=col["text"], fontsize=8)
    cb.ax.tick_params(colors=col["text"], labelsize=8)
    ax.set_title("Parameter correlations", fontsize=10)
    apply_colors(fig, col)


def render_figure(draw, result, col: dict, width_px: int, height_px: int, dpr: float = 1.0):
    """Draw a result figure off screen: (Figure, RGBA bytes, width, height) in pixels.

    Pure matplotlib (Agg), no Qt, so a worker thread can do it; matplotlib keeps
    its font objects per thread.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    dpi = 100.0 * dpr
    w, h = max(int(width_px * dpr), 50), max(int(height_px * dpr), 50)
    fig = Figure(figsize=(w / dpi, h / dpi), dpi=dpi, layout="constrained")
    canvas = FigureCanvasAgg(fig)
    draw(fig, result, col)
    canvas.draw()
    return fig, bytes(canvas.buffer_rgba()), w, h


class _FigureTab(QWidget):
    """A result figure drawn in a worker thread and shown as an image.

    The drawing of the figures of one result takes about a second on a slow
    machine; in the GUI thread that would freeze the window. Here it runs in a
    :class:`~app.worker.Job`, only for the tab on show, and the image is kept
    until the result, the colours or the tab's size change.

    Signals
    -------
    rendered() : a new image (or message) is on show
    """

    rendered = Signal()

    def __init__(self, tip: str, draw, parent=None):
        super().__init__(parent)
        self._draw = draw
        self.figure = None                # the Figure behind the image (read-only)
        self._key = None                  # what the image on show was drawn from
        self._want = None                 # (key, result, colours) still to draw
        self._job = None
        self.image = QLabel("")
        self.image.setAlignment(Qt.AlignCenter)
        self.image.setWordWrap(True)
        self.image.setToolTip(tip)
        self.image.setSizePolicy(QSizePolicy.Ignored, QSizePolicy.Ignored)
        self.image.setMinimumSize(80, 80)
        self._resize_timer = QTimer(self)
        self._resize_timer.setSingleShot(True)
        self._resize_timer.setInterval(150)
        self._resize_timer.timeout.connect(self._redo)
        self._last = None                 # (result, colours) of the last request
        lay = QVBoxLayout(self)
        lay.setContentsMargins(2, 2, 2, 2)
        lay.addWidget(self.image)

    @property
    def busy(self) -> bool:
        return self._job is not None

    def message(self, text: str):
        """Show a sentence instead of a figure."""
        self._want, self._key, self._last, self.figure = None, None, None, None
        self.image.setPixmap(QPixmap())
        self.image.setText(text)
        self.rendered.emit()

    def show_result(self, result, col: dict):
        """Draw ``result`` unless the image on show already is that drawing."""
        self._last = (result, col)
        size = self.image.size()
        w, h = (size.width(), size.height()) if size.width() > 60 else (420, 520)
        key = (id(result), tuple(sorted(col.items())), w, h)
        if key == self._key:
            return
        self._want = (key, result, col, w, h)
        if self._job is None:
            self._start()
        if self.image.pixmap().isNull():
            self.image.setText("Drawing…")

    def _start(self):
        from .worker import Job
        key, result, col, w, h = self._want
        self._want = None
        dpr = self.devicePixelRatioF()
        draw = self._draw
        job = Job(lambda stop, report: (key, *render_figure(draw, result, col, w, h, dpr)),
                  parent=self)
        job.succeeded.connect(self._done)
        job.failed.connect(lambda exc: self._failed(key, exc))
        job.done.connect(self._next)
        self._job = job
        job.start()

    def _done(self, out):
        key, fig, rgba, w, h = out
        if self._want is not None and self._want[0][0] != key[0]:
            return                        # a newer result is waiting: skip this one
        # Copied into an image Qt owns (rows of RGBA8888 are 4-byte aligned, so the
        # layouts match): no QImage holds on to a Python buffer.
        img = QImage(w, h, QImage.Format_RGBA8888)
        img.bits()[:len(rgba)] = rgba
        img.setDevicePixelRatio(w / max(key[2], 1))
        self.figure, self._key = fig, key
        self.image.setText("")
        self.image.setPixmap(QPixmap.fromImage(img))
        self.rendered.emit()

    def _failed(self, key, exc):
        self._key = key
        self.figure = None
        self.image.setPixmap(QPixmap())
        self.image.setText(f"This figure could not be drawn: {exc}")
        self.rendered.emit()

    def _next(self):
        job, self._job = self._job, None
        if job is not None:
            job.deleteLater()
        if self._want is not None:
            self._start()

    def _redo(self):
        if self._last is not None and self.isVisible():
            self.show_result(*self._last)

    def resizeEvent(self, event):
        super().resizeEvent(event)
        if self._last is not None:
            self._resize_timer.start()

    def shutdown(self):
        """Stop drawing and wait for the worker (before the window goes away)."""
        self._want, self._last = None, None
        self._resize_timer.stop()
        if self._job is not None:
            self._job.wait(30000)


class ResultPanel(QTabWidget):
    """Tabs showing the session's last fit result.

    Signals
    -------
    adopt_requested() : "Use … in the stack" was pressed on the Models tab
    """

    adopt_requested = Signal()

    def __init__(self, session, parent=None):
        super().__init__(parent)
        self.session = session

        # Summary -------------------------------------------------------------------------
        summary = QWidget()
        self.headline = QLabel("No fit yet.")
        self.headline.setWordWrap(True)
        self.headline.setTextFormat(Qt.RichText)
        self.headline.setToolTip("Film thickness with its one-standard-deviation uncertainty")
        self.thickness_label = QLabel("")
        f = self.thickness_label.font()
        f.setPointSizeF(f.pointSizeF() * 1.6)
        f.setBold(True)
        self.thickness_label.setFont(f)
        self.thickness_label.setToolTip("Fitted thickness of the first film ± 1σ (statistical), "
                                        "and U, the expanded uncertainty (k = 2) of its GUM "
                                        "budget (see the Report tab)")
        self.chi_label = QLabel("")
        self.chi_label.setWordWrap(True)
        self.chi_label.setToolTip("Goodness of fit: reduced χ² near 1 means the model "
                                  "explains the data within the noise")
        self.warnings_label = QLabel("")
        self.warnings_label.setWordWrap(True)
        self.warnings_label.setTextFormat(Qt.RichText)
        self.warnings_label.setToolTip("Things to check before trusting the result")
        self.params_table = QTableWidget(0, 4)
        self.params_table.setHorizontalHeaderLabels(["Parameter", "Value", "± σ", "Unit"])
        self.params_table.verticalHeader().setVisible(False)
        self.params_table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.params_table.horizontalHeader().setStretchLastSection(True)
        self.params_table.setEditTriggers(QTableWidget.NoEditTriggers)
        self.params_table.setToolTip("All fitted parameters; 'fixed' ones were not adjusted")
        lay = QVBoxLayout(summary)
        lay.addWidget(self.headline)
        lay.addWidget(self.thickness_label)
        lay.addWidget(self.chi_label)
        lay.addWidget(self.warnings_label)
        lay.addWidget(self.params_table, 1)
        lay.addStretch(0)          # takes the space while the table is hidden
        self._summary_layout = lay
        self.addTab(summary, "Summary")
        self.setTabToolTip(0, "Thickness ± σ, goodness of fit and warnings")

        self.optical_tab = _FigureTab("n, κ and α of the first film with ±1σ bands",
                                      draw_optical)
        self.addTab(self.optical_tab, "n κ α")
        self.setTabToolTip(1, "Optical constants of the fitted film with confidence bands")
        self.tauc_tab = _FigureTab("Tauc plot: (αhν)^r against photon energy, with the "
                                   "extrapolated band gap", draw_tauc)
        self.addTab(self.tauc_tab, "Tauc")
        self.setTabToolTip(2, "Band gap from the fitted absorption")
        self.corr_tab = _FigureTab("How strongly pairs of fitted parameters trade off "
                                   "(±1 = fully correlated)", draw_correlations)
        self.addTab(self.corr_tab, "Correlation")
        self.setTabToolTip(3, "Correlation matrix of the fitted parameters")
        self.report = QPlainTextEdit()
        self.report.setReadOnly(True)
        mono = QFontDatabase.systemFont(QFontDatabase.FixedFont)
        self.report.setFont(mono)
        self.report.setToolTip("The plain-text fit report (the same text is exported)")
        self.addTab(self.report, "Report")
        self.setTabToolTip(4, "Full text report of the fit")
        from .suggestion_view import SuggestionView
        self.models = SuggestionView(session)
        self.models.adopt_requested.connect(self.adopt_requested)
        self.addTab(self.models, "Models")
        self.setTabToolTip(5, "Which film model the data prefer: the models fitted, ranked "
                              "by BIC, and why one was chosen")
        self.setTabVisible(5, False)         # only after a model suggestion

        # Above the tabs (the window places it): says when the result no longer
        # matches the setup, in words and with a symbol, not by colour alone.
        self.banner = QLabel("")
        self.banner.setWordWrap(True)
        self.banner.setTextFormat(Qt.RichText)
        self.banner.setStyleSheet("QLabel { background: #fff3cd; color: #3d2c00; "
                                  "border: 1px solid #e0a800; padding: 4px; }")
        self.banner.setToolTip("The setup changed after this fit: the numbers belong to the "
                               "earlier setup. Fit again to update them.")
        self.banner.setVisible(False)

        # Figures are drawn only for the tab on show, in a worker thread.
        self._figure_tabs = {1: self.optical_tab, 2: self.tauc_tab, 3: self.corr_tab}
        self.currentChanged.connect(self._show_figure)
        session.result_changed.connect(self.refresh)
        session.result_stale_changed.connect(self._update_banner)
        self.refresh()

    def _show_figure(self, index: int):
        r = self.session.result
        tab = self._figure_tabs.get(index)
        if tab is None or r is None:
            return
        why = self._no_figure_reason(index, r)
        if why:
            if tab.image.text() != why or tab.figure is not None:
                tab.message(why)
            return
        tab.show_result(r, figure_colors())

    @staticmethod
    def _no_figure_reason(index: int, r) -> str:
        if index == 1 and not r.optical:
            return "This stack has no film, so there are no n, κ to show."
        if index == 2 and (r.band_gap is None or not r.optical):
            return ("No band gap in this result.\n\nChoose 'Band gap: Tauc, direct' or "
                    "'indirect' in the Fit section\nand fit an absorbing film to get one.")
        if index == 3 and (r.correl is None or len(r.var_names) < 2):
            return ("Correlations need at least two fitted parameters\n"
                    "and an estimated covariance.")
        return ""

    def show_models(self):
        """Bring the Models tab to the front (after a model suggestion)."""
        if self.isTabVisible(self.indexOf(self.models)):
            self.setCurrentWidget(self.models)

    def shutdown(self):
        """Wait for any figure still being drawn (the window is closing)."""
        for tab in self._figure_tabs.values():
            tab.shutdown()

    def _update_banner(self, *_):
        s = self.session
        stale = s.result is not None and s.result_stale
        self.banner.setVisible(stale)
        if stale:
            self.banner.setText(f"⚠ <b>Out of date:</b> {s.stale_reason} changed after this "
                                "fit. The numbers below belong to the earlier setup; press "
                                "<b>Fit</b> (Ctrl+R) to update them.")
        f = self.thickness_label.font()
        f.setStrikeOut(stale)
        self.thickness_label.setFont(f)
        self.thickness_label.setEnabled(not stale)

    # -- refresh ---------------------------------------------------------------------------
    def refresh(self):
        r = self.session.result
        if r is None:
            self.headline.setText(
                "<b>No fit yet.</b><ol style='margin-left:-20px'>"
                "<li>Open the measured spectrum (section 1).</li>"
                "<li>Pick the substrate and a model for each film (section 2); the blue "
                "curve shows what the model predicts.</li>"
                "<li>Press <b>Fit</b> (section 3). Thickness, χ², warnings, n and κ "
                "appear here.</li></ol>")
            self.thickness_label.setText("")
            self.chi_label.setText("")
            self.warnings_label.setText("")
            self.params_table.setRowCount(0)
            self.params_table.setVisible(False)
            self._summary_layout.setStretch(self._summary_layout.count() - 1, 1)
            for tab in (self.optical_tab, self.tauc_tab, self.corr_tab):
                tab.message("No fit result yet.")
            self.report.setPlainText("")
            self.models.show_result(None)
            if self.currentWidget() is self.models:
                self.setCurrentIndex(0)
            self.setTabVisible(self.indexOf(self.models), False)
            self._update_banner()
            return
        self._summary(r)
        has_models = self.models.show_result(r)
        if not has_models and self.currentWidget() is self.models:
            self.setCurrentIndex(0)
        self.setTabVisible(self.indexOf(self.models), has_models)
        self.report.setPlainText(r.report())
        self._update_banner()
        self._show_figure(self.currentIndex())

    def _summary(self, r):
        status = ("converged" if r.success else "did <b>not</b> converge")
        if r.aborted:
            status = "was stopped before it finished"
        name = (r.spectrum or {}).get("name", "") if isinstance(r.spectrum, dict) else ""
        why = "" if r.success and not r.aborted else f" {escape(r.message)}"
        info = (r.extra or {}).get("model_suggestion")
        model = ""
        if isinstance(info, dict) and info.get("candidates"):
            label = next((c.get("label") for c in info["candidates"]
                          if c.get("model") == info.get("chosen")), "?")
            n = sum(1 for c in info["candidates"] if c.get("ranked"))
            model = (f"<br>Model chosen by BIC among {n}: <b>{escape(str(label))}</b> "
                     "(see the Models tab)." if n else
                     "<br>The model suggestion stopped before any model finished (see the "
                     "Models tab).")
        self.headline.setText(f"Fit of <b>{escape(name) or 'the spectrum'}</b> {status}.{why}"
                              + model + verdict_html(r))
        try:
            d, sd = r.thickness()
            text = "Thickness  " + _pm(d, sd, "nm", 1)
            names = [k for k in r.params if k.endswith("_thickness") and r.params[k].vary]
            u = (getattr(r, "uncertainty", None) or {}).get(names[0]) if names else None
            if u is not None:
                # The expanded uncertainty (GUM, k = 2) is what a certificate states.
                text += f"   (U = {two_digits(u.expanded)} nm, k = 2)"
            self.thickness_label.setText(text)
        except KeyError:
            self.thickness_label.setText("No film layer")
        self.chi_label.setText(f"χ² = {r.chisqr:.4g}    reduced χ² = {r.redchi:.4g}    "
                               f"{r.ndata} points, {r.nvarys} fitted parameters, "
                               f"{r.nfev} evaluations, {r.elapsed_s:.1f} s")
        warn = list(r.warnings)
        if r.band_gap is not None:
            g = r.band_gap
            warn_html = (f"Band gap from the Tauc plot ({g.transition} transition): "
                         f"<b>{_pm(g.Eg_eV, g.sigma_eV, 'eV', 3)}</b><br>")
        else:
            warn_html = ""
        if r.alternatives:
            alts = ", ".join(f"{a.thickness_nm:.0f} nm" for a in r.alternatives)
            warn.append(f"Other thicknesses fit almost as well: {alts}. Check against a "
                        f"second measurement or a known value.")
        if warn:
            items = "".join(f"<li>{escape(str(w))}</li>" for w in warn)
            warn_html += f"<b>Please check:</b><ul style='margin:0'>{items}</ul>"
        else:
            warn_html += "No warnings."
        self.warnings_label.setText(warn_html)
        rows = list(r.params.values())
        self.params_table.setVisible(True)
        self._summary_layout.setStretch(self._summary_layout.count() - 1, 0)
        self.params_table.setRowCount(len(rows))
        for i, p in enumerate(rows):
            sd = "" if p.stderr is None or not math.isfinite(p.stderr) else f"{p.stderr:.3g}"
            if not p.vary:
                sd = "fixed"
            if p.at_bound:
                sd += "  (at bound)"
            for j, txt in enumerate((_label(p.name, r), f"{p.value:.6g}", sd, p.unit)):
                it = QTableWidgetItem(txt)
                if j in (1, 2):
                    it.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
                self.params_table.setItem(i, j, it)
