"""The parameter table of one layer: value, bounds, unit, fit flag and meaning.

A :class:`ParamTableModel` (a ``QAbstractTableModel``) shows the parameters of
the selected layer of the :class:`~app.session.Session` stack and writes edits
back through :meth:`Session.set_param`, so every change is undoable. An entry
that the fitting core refuses (value outside its bounds, min >= max, a
negative thickness, text that is not a number) is not stored: the cell keeps
its old value and :attr:`ParamTableModel.refused` carries the reason for the
status bar and a tooltip at the cell. The parameters of a *known* layer are
held by every fit: their Fit ticks show as off and cannot be changed until the
layer is fitted again (its own ticks then come back).
"""

from __future__ import annotations

import math

from PySide6.QtCore import QAbstractTableModel, QModelIndex, Qt, Signal
from PySide6.QtGui import QBrush, QColor
from PySide6.QtWidgets import QHeaderView, QTableView, QToolTip

from fitting.errors import PellucidError

__all__ = ["ParamTableModel", "ParamTableView", "COLUMNS"]

COLUMNS = ("Parameter", "Value", "Unit", "Min", "Max", "Fit", "± σ (last fit)")
_COL_TIPS = (
    "Parameter name (hover a row for its meaning)",
    "Current value: the start of the next fit. Double-click to edit.",
    "Unit of value and bounds",
    "Lower bound the fit may not go below (empty = none)",
    "Upper bound the fit may not go above (empty = none)",
    "Ticked: the fit adjusts this parameter. Unticked: it stays fixed.",
    "One-standard-deviation uncertainty from the last fit",
)
_FIELD = {1: "value", 3: "min", 4: "max"}
_SYMBOL = {"k": "κ", "k0": "κ₀", "eps_inf": "ε∞", "gamma": "Γ", "Eu": "E_U", "E0": "E₀",
           "Eg": "E_g", "Ep": "E_p", "E_edge": "E_edge", "thickness": "thickness d"}


def _fmt(x: float) -> str:
    if x is None:
        return ""
    if not math.isfinite(x):
        return ""
    return f"{x:.6g}"


def pretty_name(local: str) -> str:
    """A readable label for a local parameter name (``o1_E0`` -> ``term 1: E₀``)."""
    if local.startswith("o") and "_" in local and local[1:local.index("_")].isdigit():
        i, rest = local[1:].split("_", 1)
        return f"term {i}: {_SYMBOL.get(rest, rest)}"
    for pre, what in (("host_", "film "), ("incl_", "void ")):
        if local.startswith(pre):
            rest = local[len(pre):]
            return what + _SYMBOL.get(rest, rest)
    return _SYMBOL.get(local, local)


class ParamTableModel(QAbstractTableModel):
    """Parameters of one layer of the session's stack, editable in place."""

    refused = Signal(str, QModelIndex)

    def __init__(self, session, parent=None):
        super().__init__(parent)
        self.session = session
        self.layer_index = 0
        self._rows: list[tuple[str, str]] = []     # (global name, local name)
        self._bad: dict[tuple[int, int], str] = {}
        session.stack_changed.connect(self.refresh)
        session.result_changed.connect(self.refresh)
        session.result_stale_changed.connect(self.refresh)
        self.refresh()

    def set_layer(self, index: int) -> None:
        self.layer_index = index
        self._bad.clear()
        self.refresh()

    def refresh(self) -> None:
        self.beginResetModel()
        layers = self.session.stack.layers
        self._rows = []
        if 0 <= self.layer_index < len(layers):
            layer = layers[self.layer_index]
            self._rows.append((f"{layer.name}_thickness", "thickness"))
            self._rows += [(f"{layer.name}_{k}", k) for k in layer.material.params]
        self.endResetModel()

    def global_name(self, row: int) -> str:
        return self._rows[row][0]

    # -- Qt model interface -----------------------------------------------------------
    def rowCount(self, parent=QModelIndex()):
        return 0 if parent.isValid() else len(self._rows)

    def columnCount(self, parent=QModelIndex()):
        return 0 if parent.isValid() else len(COLUMNS)

    def headerData(self, section, orientation, role=Qt.ItemDataRole.DisplayRole):
        if orientation == Qt.Orientation.Horizontal:
            if role == Qt.ItemDataRole.DisplayRole:
                return COLUMNS[section]
            if role == Qt.ItemDataRole.ToolTipRole:
                return _COL_TIPS[section]
        return None

    def layer_known(self) -> bool:
        layers = self.session.stack.layers
        return 0 <= self.layer_index < len(layers) and layers[self.layer_index].known

    def flags(self, index):
        f = Qt.ItemFlag.ItemIsEnabled | Qt.ItemFlag.ItemIsSelectable
        if index.column() in _FIELD:
            f |= Qt.ItemFlag.ItemIsEditable
        if index.column() == 5:
            # A known layer's parameters are held: the tick is shown off, not editable.
            f = (Qt.ItemFlag.ItemIsSelectable if self.layer_known()
                 else f | Qt.ItemFlag.ItemIsUserCheckable)
        return f

    def _sigma(self, name: str):
        r = self.session.result
        if r is None or name not in r.params:
            return None
        # Only when the result fitted this layer's model (a suggested model that was
        # not adopted has other parameters: its σ would sit beside the wrong values).
        if any(g not in r.params for g, _local in self._rows):
            return None
        return r.params[name].stderr

    # Qt's full enum names (Qt.ItemDataRole.DisplayRole): PySide6 resolves the short
    # forms (Qt.DisplayRole) through a slow fallback, ~7 µs each, and a view calls
    # data() about a thousand times per repaint.
    def data(self, index, role=Qt.ItemDataRole.DisplayRole):
        if not index.isValid():
            return None
        name, local = self._rows[index.row()]
        p = self.session.param(name)
        col = index.column()
        if role in (Qt.ItemDataRole.DisplayRole, Qt.ItemDataRole.EditRole):
            if col == 0:
                return pretty_name(local)
            if col == 1:
                return _fmt(p.value)
            if col == 2:
                return p.unit
            if col == 3:
                return _fmt(p.min)
            if col == 4:
                return _fmt(p.max)
            if col == 6:
                s = self._sigma(name)
                if s is None or not math.isfinite(s):
                    return ""
                # In brackets (and grey) when the fit no longer matches the setup.
                return f"({s:.3g})" if self.session.result_stale else f"{s:.3g}"
        if role == Qt.ItemDataRole.ForegroundRole and col == 6 and self.session.result_stale:
            return QBrush(QColor(128, 128, 128))
        if role == Qt.ItemDataRole.CheckStateRole and col == 5:
            on = p.vary and not self.layer_known()
            return Qt.CheckState.Checked if on else Qt.CheckState.Unchecked
        if role == Qt.ItemDataRole.ToolTipRole:
            bad = self._bad.get((index.row(), col))
            if bad:
                return bad
            if col == 6 and self.session.result_stale and self._sigma(name) is not None:
                return "σ of the last fit, which is out of date (the setup changed since)"
            if col == 5 and self.layer_known():
                return ("Held: the layer is known, so nothing of it is fitted. Untick "
                        "'Known' to fit it again.")
            tip = f"{name}: {p.doc or 'model parameter'}"
            if p.expr:
                tip += f"\nTied to: {p.expr}"
            return tip
        if role == Qt.ItemDataRole.BackgroundRole and (index.row(), col) in self._bad:
            return QBrush(QColor(220, 60, 60, 90))
        if role == Qt.ItemDataRole.TextAlignmentRole and col in (1, 3, 4, 6):
            return Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter
        return None

    def setData(self, index, value, role=Qt.ItemDataRole.EditRole):
        if not index.isValid():
            return False
        name, _local = self._rows[index.row()]
        col = index.column()
        try:
            if col == 5 and role == Qt.ItemDataRole.CheckStateRole:
                if self.layer_known():
                    raise PellucidError(f"{name} is held: the layer is known; untick "
                                        "'Known' to fit its parameters")
                checked = value is True or value == Qt.CheckState.Checked or value == 2 or (
                    getattr(value, "value", None) == 2)
                self.session.set_param(name, vary=bool(checked))
            elif col in _FIELD and role == Qt.ItemDataRole.EditRole:
                text = str(value).strip().replace(",", ".") if isinstance(value, str) else value
                if col == 1 and text == "":
                    raise PellucidError(f"{name}: a value is required")
                self.session.set_param(name, **{_FIELD[col]: text})
            else:
                return False
        except PellucidError as exc:
            reason = f"Not accepted: {exc}"
            self._bad[(index.row(), col)] = reason
            self.dataChanged.emit(index, index)
            self.refused.emit(reason, index)
            return False
        self._bad.pop((index.row(), col), None)
        return True


class ParamTableView(QTableView):
    """Table view that shows a refusal as a tooltip right at the cell."""

    def __init__(self, model: ParamTableModel, parent=None):
        super().__init__(parent)
        self.setModel(model)
        self.setAlternatingRowColors(True)
        self.verticalHeader().setVisible(False)
        h = self.horizontalHeader()
        h.setSectionResizeMode(QHeaderView.ResizeToContents)
        h.setStretchLastSection(True)
        self.setEditTriggers(QTableView.DoubleClicked | QTableView.EditKeyPressed
                             | QTableView.AnyKeyPressed)
        self.setToolTip("Parameters of the selected layer. Double-click a value or bound to "
                        "edit it; tick 'Fit' to let the fit adjust it.")
        model.refused.connect(self._show_refusal)

    def sizeHint(self):
        # A modest hint: the stack section's stretch gives the table whatever room is
        # left, and the left column then needs no scroll bar at 1400x900.
        hint = super().sizeHint()
        hint.setHeight(140)
        return hint

    def _show_refusal(self, reason: str, index):
        rect = self.visualRect(index)
        QToolTip.showText(self.viewport().mapToGlobal(rect.bottomLeft()), reason, self)
