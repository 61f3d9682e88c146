"""The "Models" result tab: how a model suggestion ranked the film models, and its choice.

A model suggestion (:func:`fitting.suggest.suggest_model`) fits the plausible
film models and ranks them by the Bayesian information criterion, BIC = χ²/ĉ +
k ln N (Schwarz 1978; lower is better). The tab shows, from the ranking the
result carries in ``extra["model_suggestion"]`` (so a reopened project shows
it too): which model was chosen and why, in the words of the suggestion, and a
table of every candidate (parameters k, reduced χ², BIC, ΔBIC, verdict,
thickness). ΔBIC is read with Kass & Raftery's (1995) scale, given in the
column's tooltip. A chosen model that is not the one in the stack is offered
with a button; the window adopts it (undoable).
"""

from __future__ import annotations

import math
from html import escape

from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QFont
from PySide6.QtWidgets import (QAbstractScrollArea, QHeaderView, QLabel, QPushButton,
                               QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget)

from fitting.presets import model_choice_of
from fitting.suggest import evidence_words

from .result_panel import VERDICT_STYLE

__all__ = ["SuggestionView", "suggestion_of"]

COLUMNS = ("Model", "k", "χ²red", "BIC", "ΔBIC", "Verdict", "d (nm)")
_TIPS = ("Film model fitted; ✔ marks the one chosen, (yours) the model you had set up",
         "Number of fitted parameters (with the 100 % line corrections)",
         "Reduced χ²: about 1 when the model fits within the noise",
         "Bayesian information criterion, χ²/ĉ + k·ln N: rewards a close fit, charges "
         "for every parameter. Lower is better.",
         "BIC minus the lowest BIC. Kass & Raftery 1995: below 2 not worth mentioning, "
         "2-6 positive, 6-10 strong, above 10 very strong evidence against the model",
         "The fit's own verdict: a model whose fit is poor is never chosen",
         "Fitted thickness of the layer the models were tried on")


def suggestion_of(result) -> dict | None:
    """The ranking a result carries (``extra["model_suggestion"]``), or None."""
    info = (getattr(result, "extra", None) or {}).get("model_suggestion")
    return info if isinstance(info, dict) and info.get("candidates") else None


def _num(x, fmt: str) -> str:
    return "" if x is None or not math.isfinite(x) else format(x, fmt)


def _bic(x) -> str:
    """One decimal where differences of about 2 matter; whole numbers beyond 1000."""
    return _num(x, ".1f" if x is not None and abs(x) < 1000 else ".0f")


class SuggestionView(QWidget):
    """Reason, ranking table and the "Use … in the stack" button of a model suggestion.

    Signals
    -------
    adopt_requested() : the user asked to put the chosen model into the stack
    """

    adopt_requested = Signal()

    def __init__(self, session, parent=None):
        super().__init__(parent)
        self.session = session
        self.info: dict | None = None
        self.reason = QLabel("")
        self.reason.setWordWrap(True)
        self.reason.setTextFormat(Qt.RichText)
        self.reason.setToolTip("Which model the suggestion chose and why")
        self.table = QTableWidget(0, len(COLUMNS))
        self.table.setHorizontalHeaderLabels(COLUMNS)
        for j, tip in enumerate(_TIPS):
            self.table.horizontalHeaderItem(j).setToolTip(tip)
        self.table.verticalHeader().setVisible(False)
        h = self.table.horizontalHeader()
        h.setSectionResizeMode(QHeaderView.ResizeToContents)
        h.setStretchLastSection(False)      # a stretched last column starts 100 px wide
        self.table.setEditTriggers(QTableWidget.NoEditTriggers)
        # As tall as its rows: the footnote and the button sit right under it.
        self.table.setSizeAdjustPolicy(QAbstractScrollArea.AdjustToContents)
        self.table.setToolTip("Every film model fitted, best BIC first; hover a header for "
                              "what the column means")
        self.footnote = QLabel("")
        self.footnote.setWordWrap(True)
        self.footnote.setToolTip("How the BIC was computed for this spectrum")
        self.adopt_button = QPushButton("")
        self.adopt_button.setToolTip("Replace the model in the stack by the chosen one, with "
                                     "its fitted values (Ctrl+Z undoes it)")
        self.adopt_button.clicked.connect(self.adopt_requested)
        lay = QVBoxLayout(self)
        lay.addWidget(self.reason)
        lay.addWidget(self.table)
        lay.addWidget(self.footnote)
        lay.addWidget(self.adopt_button)
        lay.addStretch(1)
        session.stack_changed.connect(self._update_button)

    # -- view -------------------------------------------------------------------------------
    def show_result(self, result) -> bool:
        """Show the ranking of ``result``; False (and nothing shown) if it has none."""
        self.info = info = suggestion_of(result)
        if info is None:
            self.table.setRowCount(0)
            self.reason.setText("")
            return False
        cands = info["candidates"]
        chosen = next((c for c in cands if c.get("model") == info.get("chosen")), None)
        label = chosen.get("label", "?") if chosen else "none"
        reason = str(info.get("reason") or "")
        head = (f"<b>Chosen for layer '{escape(str(info.get('layer', '')))}': "
                f"{escape(label)}</b>")
        if chosen and chosen.get("current"):
            head += " (the model you set up)"
        text = f"{head}<br>{escape(reason[:1].upper() + reason[1:])}."
        if info.get("stopped"):
            text = ("<span style='color:#B36B00'>⚠ <b>Stopped:</b> not every model was "
                    "fitted, so the choice is only among those that were.</span><br>" + text)
        self.reason.setText(text)
        self.table.setRowCount(len(cands))
        for i, c in enumerate(cands):
            self._fill_row(i, c, c is chosen)
        self.table.resizeRowsToContents()
        n, c_hat = info.get("n_points"), info.get("c_hat")
        self.footnote.setText(
            f"BIC = χ²/ĉ + k·ln N with N = {n} points"
            + (f", ĉ = {c_hat:.3g}" if isinstance(c_hat, (int, float)) else "")
            + " (Schwarz 1978). Lower is better; a ΔBIC above 10 is very strong evidence "
            "against a model (Kass & Raftery 1995). Verdict: "
            + ", ".join(f"{sym} {words}" for sym, _c, words in VERDICT_STYLE.values()) + ".")
        self._update_button()
        return True

    def _fill_row(self, i: int, c: dict, is_chosen: bool):
        # Long names over two lines: the result area is narrow.
        label = str(c.get("label", c.get("model", "?"))).replace(" + ", "\n+ ")
        name = ("✔ " if is_chosen else "") + label + ("\n(yours)" if c.get("current") else "")
        if c.get("ranked"):
            d_bic = c.get("delta_bic")
            cells = (name, str(c.get("k", "")), _num(c.get("redchi"), ".3g"),
                     _bic(c.get("bic")), _bic(d_bic),
                     self._verdict(c.get("verdict")), _num(c.get("thickness_nm"), ".1f"))
        else:
            why = c.get("error") or "not ranked"
            cells = (name, "", "", "", "", "–", _num(c.get("thickness_nm"), ".1f"))
        for j, txt in enumerate(cells):
            it = QTableWidgetItem(txt)
            if j in (1, 2, 3, 4, 6):
                it.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
            elif j == 5:
                it.setTextAlignment(Qt.AlignCenter)
            if is_chosen:
                f = QFont(it.font())
                f.setBold(True)
                it.setFont(f)
            if not c.get("ranked"):
                it.setToolTip(f"Not ranked: {why}")
            elif j == 4 and c.get("delta_bic") is not None:
                it.setToolTip("best BIC" if c["delta_bic"] == 0 else
                              f"{evidence_words(c['delta_bic'])} evidence against this "
                              "model (Kass & Raftery 1995)")
            elif j == 5 and c.get("verdict"):
                it.setToolTip(VERDICT_STYLE.get(c["verdict"], ("", "", c["verdict"]))[2])
            self.table.setItem(i, j, it)

    @staticmethod
    def _verdict(v) -> str:
        """The verdict's symbol (its words are in the cell's tooltip and the footnote)."""
        return VERDICT_STYLE.get(str(v), ("•", "", str(v)))[0] if v else ""

    def chosen_label(self) -> str:
        info = self.info or {}
        return next((str(c.get("label")) for c in info.get("candidates", [])
                     if c.get("model") == info.get("chosen")), "")

    def can_adopt(self) -> bool:
        """The chosen model is not the one the stack has in that layer now."""
        info = self.info
        if not info or not info.get("chosen") or self.session.result is None:
            return False
        layer = next((x for x in self.session.stack.layers if x.name == info.get("layer")),
                     None)
        return layer is not None and model_choice_of(layer.material) != info["chosen"]

    def _update_button(self):
        label = self.chosen_label()
        can = self.can_adopt()
        self.adopt_button.setEnabled(can)
        self.adopt_button.setVisible(bool(label))
        self.adopt_button.setText(f"Use {label} in the stack" if can
                                  else f"{label} is the model in the stack")
