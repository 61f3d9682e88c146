"""The "Result" area: summary, optical constants, Tauc plot, correlations and the report.

Everything shown comes from the session's :class:`~fitting.result.FitResult`;
figures are drawn by :mod:`fitting.plots` into embedded canvases (the same
drawings as the exported PNG and PDF) and then recoloured to the palette.
"""

from __future__ import annotations

import math

import numpy as np
from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
from matplotlib.figure import Figure
from PySide6.QtCore import Qt
from PySide6.QtGui import QFontDatabase
from PySide6.QtWidgets import (QHeaderView, QLabel, QPlainTextEdit, QTableWidget,
                               QTableWidgetItem, QTabWidget, QVBoxLayout, QWidget)

from .theme import figure_colors, style_figure

__all__ = ["ResultPanel"]


def _pm(value, sigma, unit="", digits=2):
    if value is None or not math.isfinite(value):
        return "–"
    if sigma is not None and math.isfinite(sigma):
        return f"{value:.{digits}f} ± {sigma:.{digits}f} {unit}".rstrip()
    return f"{value:.{digits}f} {unit} (σ not estimated)".rstrip()


_NUISANCE = {"scale": "scale of the 100 % line", "offset": "offset (stray light)",
             "angle_deg": "angle of incidence", "thickness_spread": "thickness spread"}


def _label(name: str, r) -> str:
    """``film_o1_E0`` -> ``film: term 1: E₀``; nuisance names (scale, offset) as they are."""
    from .param_table import pretty_name
    for layer in (r.stack or {}).get("layers", []):
        pre = f"{layer.get('name')}_"
        if name.startswith(pre):
            return f"{layer.get('name')}: {pretty_name(name[len(pre):])}"
    return _NUISANCE.get(name, name)


class _FigureTab(QWidget):
    def __init__(self, tip: str, parent=None):
        super().__init__(parent)
        self.figure = Figure(figsize=(4, 4), layout="constrained")
        self.canvas = FigureCanvasQTAgg(self.figure)
        self.canvas.setToolTip(tip)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(2, 2, 2, 2)
        lay.addWidget(self.canvas)

    def message(self, text: str):
        self.figure.clear()
        col = figure_colors()
        self.figure.text(0.5, 0.5, text, ha="center", va="center", color=col["text"],
                         fontsize=10, wrap=True)
        self.figure.set_facecolor(col["figure"])
        self.canvas.draw_idle()

    def finish(self):
        col = style_figure(self.figure)
        for ax in self.figure.axes:
            ax.grid(True, color=col["grid"], lw=0.5, alpha=0.6)
            for line in ax.get_lines():
                if line.get_color() in ("#000000", "black", "k"):
                    line.set_color(col["text"])
            for t in ax.texts:
                t.set_color(col["text"])
        for t in self.figure.texts:
            t.set_color(col["text"])
        if getattr(self.figure, "_suptitle", None) is not None:
            self.figure._suptitle.set_color(col["text"])
        self.canvas.draw_idle()


class ResultPanel(QTabWidget):
    """Tabs showing the session's last fit result."""

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
        self.thickness_label.setToolTip("Fitted thickness of the first film ± 1σ")
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

        self.optical_tab = _FigureTab("n, κ and α of the first film with ±1σ bands")
        self.addTab(self.optical_tab, "n κ α")
        self.setTabToolTip(1, "Optical constants of the fitted film with confidence bands")
        self.tauc_tab = _FigureTab("Tauc plot: (αhν)^r against photon energy, with the "
                                   "extrapolated band gap")
        self.addTab(self.tauc_tab, "Tauc")
        self.setTabToolTip(2, "Band gap from the fitted absorption")
        self.corr_tab = _FigureTab("How strongly pairs of fitted parameters trade off "
                                   "(±1 = fully correlated)")
        self.addTab(self.corr_tab, "Correlation")
        self.setTabToolTip(3, "Correlation matrix of the fitted parameters")
        self.report = QPlainTextEdit()
        self.report.setReadOnly(True)
        mono = QFontDatabase.systemFont(QFontDatabase.FixedFont)
        self.report.setFont(mono)
        self.report.setToolTip("The plain-text fit report (the same text is exported)")
        self.addTab(self.report, "Report")
        self.setTabToolTip(4, "Full text report of the fit")

        # Figures are drawn only when their tab is shown: drawing all four after
        # every fit would hold the GUI thread for a second on a slow machine.
        self._stale: set[int] = set()
        self._drawers = {1: self._optical, 2: self._tauc, 3: self._correlations}
        self.currentChanged.connect(self._draw_if_stale)
        session.result_changed.connect(self.refresh)
        self.refresh()

    def _draw_if_stale(self, index: int):
        r = self.session.result
        if index in self._stale and r is not None:
            self._stale.discard(index)
            self._drawers[index](r)

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
            return
        self._summary(r)
        self.report.setPlainText(r.report())
        self._stale = set(self._drawers)
        self._draw_if_stale(self.currentIndex())

    def _summary(self, r):
        status = ("converged" if r.success else "did <b>not</b> converge")
        if r.aborted:
            status = "was stopped before it finished"
        name = (r.spectrum or {}).get("name", "") if isinstance(r.spectrum, dict) else ""
        why = "" if r.success and not r.aborted else f" {r.message}"
        self.headline.setText(f"Fit of <b>{name or 'the spectrum'}</b> {status}.{why}")
        try:
            d, sd = r.thickness()
            self.thickness_label.setText("Thickness  " + _pm(d, sd, "nm", 1))
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
            items = "".join(f"<li>{w}</li>" for w in warn)
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

    def _optical(self, r):
        if not r.optical:
            self.optical_tab.message("This stack has no film, so there are no n, κ to show.")
            return
        from fitting.plots import optical_figure
        optical_figure(r, alpha=True, fig=self.optical_tab.figure)
        self.optical_tab.finish()

    def _tauc(self, r):
        if r.band_gap is None:
            self.tauc_tab.message("No band gap in this result.\n\nChoose 'Band gap: Tauc, "
                                  "direct' or 'indirect' in the Fit section\nand fit an "
                                  "absorbing film to get one.")
            return
        from fitting.plots import tauc_figure
        try:
            tauc_figure(r, fig=self.tauc_tab.figure)
        except (ValueError, KeyError) as exc:
            self.tauc_tab.message(str(exc))
            return
        # Show the edge, not the whole transparent range: about 1 eV either side of Eg.
        ax = self.tauc_tab.figure.axes[0]
        eg = r.band_gap.Eg_eV
        lo, hi = r.band_gap.fit_range_eV
        ax.set_xlim(eg - 1.0, max(hi, eg) + 0.8)
        ys = [line.get_ydata() for line in ax.get_lines()[:1]]
        xs = [line.get_xdata() for line in ax.get_lines()[:1]]
        if ys and len(ys[0]):
            sel = (np.asarray(xs[0]) <= max(hi, eg) + 0.8)
            top = np.nanmax(np.asarray(ys[0], dtype=float)[sel]) if sel.any() else None
            if top is not None and np.isfinite(top) and top > 0:
                ax.set_ylim(0, 1.05 * top)
        self.tauc_tab.finish()

    def _correlations(self, r):
        fig = self.corr_tab.figure
        if r.correl is None or len(r.var_names) < 2:
            self.corr_tab.message("Correlations need at least two fitted parameters\n"
                                  "and an estimated covariance.")
            return
        fig.clear()
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
        col = figure_colors()
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
        style_figure(fig)
        self.corr_tab.canvas.draw_idle()
