"""The "Sample stack" section: substrate, film layers, each layer's model and parameters.

Layers are listed as they sit on the sample, from the ambient (top) down to
the substrate (bottom), which is how the light meets them. All edits go
through the :class:`~app.session.Session` and can be undone.

A layer measured earlier can be held as *known* (``Layer.known``: nothing of it
is fitted), and a known layer can be made from an earlier result's n, κ export
(:func:`fitting.known.known_layer_from_export`), with its thickness held too or
fitted.
"""

from __future__ import annotations

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (QCheckBox, QComboBox, QDoubleSpinBox, QFileDialog, QFormLayout,
                               QHBoxLayout, QInputDialog, QLabel, QListWidget, QListWidgetItem,
                               QPushButton, QToolButton, QVBoxLayout, QWidget)

from fitting.errors import ParameterError, PellucidError
from fitting.substrates import SUBSTRATE_LIBRARY

from .param_table import ParamTableModel, ParamTableView
from .session import MODEL_CHOICES, SUBSTRATE_NAMES, make_model, model_choice_of

__all__ = ["StackPanel", "model_label", "exact_choice"]

_TERM_NAMES = {"lorentz": "Lorentz", "drude": "Drude", "tauc_lorentz": "Tauc-Lorentz"}


def model_label(model) -> str:
    """A short name read from the model itself: ``Tauc-Lorentz + Lorentz``,
    ``Sellmeier, 3 terms``, ``Cauchy + Urbach tail``, ``table nk_ito``."""
    d = model.to_dict()
    kind = d.get("kind")
    if kind == "oscillators":
        names = [_TERM_NAMES.get(t, t) for t in d.get("terms", [])]
        if len(names) > 1 and len(set(names)) == 1:
            return f"{len(names)} × {names[0]}"
        return " + ".join(names) or "Oscillators"
    if kind == "sellmeier":
        n = d.get("terms", 1)
        return f"Sellmeier, {n} term{'s' if n > 1 else ''}"
    if kind == "cauchy":
        return "Cauchy + Urbach tail" if d.get("urbach") else "Cauchy"
    if kind == "bruggeman":
        return "Roughness (film + voids)"
    return model.describe()


def exact_choice(model) -> str | None:
    """The menu key whose fresh model has the same structure, or None (a custom model,
    e.g. from a recipe: then the menu shows its own label instead of a near miss)."""
    key = model_choice_of(model)
    if key in ("tabulated", "roughness"):
        return key
    shape = lambda d: {k: d.get(k) for k in ("kind", "urbach", "terms")}  # noqa: E731
    try:
        fresh = make_model(key)
    except PellucidError:
        return None
    return key if shape(fresh.to_dict()) == shape(model.to_dict()) else None

_CUSTOM = "__custom__"     # model combo entry: a model no menu entry describes exactly
_TABLE = "__table__"       # combo entry: a substrate material read from an n, κ file
_BARE = "__bare__"         # combo entry: a measured T spectrum of the bare slide


class StackPanel(QWidget):
    """Substrate chooser, layer list with add/remove/reorder, model chooser, parameter table.

    Signals
    -------
    error(str, str) : title and message of an error to show in a dialog
    status(str, bool) : a status-bar message (True = refusal)
    """

    error = Signal(str, str)
    status = Signal(str, bool)

    def __init__(self, session, parent=None):
        super().__init__(parent)
        self.session = session
        self._updating = False

        # Substrate --------------------------------------------------------------------
        self.substrate_combo = QComboBox()
        for key in SUBSTRATE_LIBRARY:
            self.substrate_combo.addItem(SUBSTRATE_NAMES.get(key, key), key)
        self.substrate_combo.addItem("n, κ table from file…", _TABLE)
        self.substrate_combo.addItem("Measured bare slide (T spectrum)…", _BARE)
        self.substrate_combo.setToolTip("Substrate material (thick, incoherent; its "
                                        "back-side reflection is included)")
        self.substrate_combo.currentIndexChanged.connect(self._on_substrate)
        self.substrate_thickness = QDoubleSpinBox()
        self.substrate_thickness.setRange(0.01, 100.0)
        self.substrate_thickness.setDecimals(3)
        self.substrate_thickness.setSuffix(" mm")
        self.substrate_thickness.setSingleStep(0.1)
        self.substrate_thickness.setKeyboardTracking(False)
        self.substrate_thickness.setToolTip("Substrate thickness in mm (sets its absorption "
                                            "path; fringes do not depend on it)")
        self.substrate_thickness.valueChanged.connect(self._on_substrate_thickness)
        self.substrate_n = QDoubleSpinBox()
        self.substrate_n.setRange(1.0, 4.0)
        self.substrate_n.setDecimals(4)
        self.substrate_n.setSingleStep(0.01)
        self.substrate_n.setKeyboardTracking(False)
        self.substrate_n.setPrefix("n = ")
        self.substrate_n.setToolTip("Refractive index of a glass described by one constant n")
        self.substrate_n.valueChanged.connect(self._on_substrate_n)

        # Layers -----------------------------------------------------------------------
        self.layer_list = QListWidget()
        self.layer_list.setToolTip("Film layers as they sit on the sample: the top row faces "
                                   "the light source side (ambient), the bottom row lies on "
                                   "the substrate. Double-click to rename.")
        self.layer_list.setMaximumHeight(60)
        self.layer_list.setHorizontalScrollBarPolicy(Qt.ScrollBarAlwaysOff)
        self.layer_list.setTextElideMode(Qt.ElideRight)
        self.layer_list.currentRowChanged.connect(self._on_layer_selected)
        self.layer_list.itemDoubleClicked.connect(self._rename)

        self.add_button = QToolButton()
        self.add_button.setText("Add layer")
        self.add_button.setToolTip("Add a film layer on top of the selected one")
        self.add_button.setPopupMode(QToolButton.InstantPopup)
        from PySide6.QtWidgets import QMenu
        menu = QMenu(self.add_button)
        for key, label in MODEL_CHOICES.items():
            act = menu.addAction(label)
            act.triggered.connect(lambda _=False, k=key: self.add_layer(k))
        menu.addSeparator()
        act = menu.addAction("Load n, κ from an earlier result (known layer)…")
        act.setToolTip("A layer measured before, from its n, κ export (<name>_nk_<layer>.csv): "
                       "n, κ and thickness are held, nothing of it is fitted")
        act.triggered.connect(lambda: self.load_known(fit_thickness=False))
        act = menu.addAction("Load n, κ from an earlier result, fit the thickness…")
        act.setToolTip("Reuse an earlier result's n, κ for a new film of the same material; "
                       "only its thickness is fitted")
        act.triggered.connect(lambda: self.load_known(fit_thickness=True))
        menu.setToolTipsVisible(True)
        self.add_button.setMenu(menu)
        self.remove_button = QPushButton("Remove")
        self.remove_button.setToolTip("Remove the selected layer (can be undone)")
        self.remove_button.clicked.connect(self._remove)
        self.up_button = QPushButton("Move up")
        self.up_button.setToolTip("Move the selected layer one place toward the ambient")
        self.up_button.clicked.connect(lambda: self._move(-1))
        self.down_button = QPushButton("Move down")
        self.down_button.setToolTip("Move the selected layer one place toward the substrate")
        self.down_button.clicked.connect(lambda: self._move(+1))

        self.model_combo = QComboBox()
        for key, label in MODEL_CHOICES.items():
            self.model_combo.addItem(label, key)
        self.model_combo.setToolTip("Dispersion model of the selected layer: how n and κ "
                                    "vary with wavelength")
        self.model_combo.activated.connect(self._on_model)
        self.known_box = QCheckBox("Known (do not fit)")
        self.known_box.setToolTip("Tick for a layer measured earlier: its thickness and n, κ "
                                  "stay at the values in the table in every fit. Untick to "
                                  "fit it again with its own Fit ticks.")
        self.known_box.toggled.connect(self._on_known)

        self.table_model = ParamTableModel(session, self)
        self.table = ParamTableView(self.table_model)
        self.table.setMinimumHeight(100)
        self.table_model.refused.connect(lambda msg, _i: self.status.emit(msg, True))

        # Layout -----------------------------------------------------------------------
        form = QFormLayout()
        form.setFieldGrowthPolicy(QFormLayout.AllNonFixedFieldsGrow)
        form.addRow("Substrate:", self.substrate_combo)
        sub_row = QHBoxLayout()
        sub_row.addWidget(self.substrate_thickness)
        sub_row.addWidget(self.substrate_n)
        form.addRow("", sub_row)
        buttons = QHBoxLayout()
        for b in (self.add_button, self.remove_button, self.up_button, self.down_button):
            buttons.addWidget(b)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addLayout(form)
        lay.addWidget(QLabel("Film layers (top = ambient side):"))
        lay.addWidget(self.layer_list)
        lay.addLayout(buttons)
        model_row = QFormLayout()
        model_row.setFieldGrowthPolicy(QFormLayout.AllNonFixedFieldsGrow)
        model_line = QHBoxLayout()
        model_line.addWidget(self.model_combo, 1)
        model_line.addWidget(self.known_box)
        model_row.addRow("Model:", model_line)
        lay.addLayout(model_row)
        lay.addWidget(self.table, 1)

        session.stack_changed.connect(self.refresh)
        self.refresh()

    # -- view from session ----------------------------------------------------------------
    def refresh(self):
        self._updating = True
        try:
            st = self.session.stack
            sub = st.substrate
            i = self.substrate_combo.findData(sub.library)
            if i < 0:
                if self.substrate_combo.findData("") < 0:
                    self.substrate_combo.insertItem(self.substrate_combo.count() - 1,
                                                    "Custom material", "")
                i = self.substrate_combo.findData("")
                self.substrate_combo.setItemText(i, f"Custom: {sub.name}")
            self.substrate_combo.setCurrentIndex(i)
            self.substrate_thickness.setValue(sub.thickness_mm)
            is_glass = sub.library == "generic_glass"
            self.substrate_n.setVisible(is_glass)
            if is_glass:
                self.substrate_n.setValue(sub.material.params["n"].value)
            row = self.layer_list.currentRow()
            self.layer_list.clear()
            for layer in st.layers:
                kind = model_label(layer.material)
                held = ", known" if layer.known else ""
                it = QListWidgetItem(f"{layer.name}  —  {kind}, {layer.thickness.value:.1f} nm"
                                     f"{held}")
                tip = (f"Layer '{layer.name}': {kind} ({layer.material.describe()}), "
                       f"{len(layer.material.params)} parameters")
                if layer.known:
                    tip += "; known: held at these values, not fitted"
                src = (layer.source or {}).get("file")
                if src:
                    tip += f"\nn, κ from {src}"
                it.setToolTip(tip)
                self.layer_list.addItem(it)
            if st.layers:
                row = min(max(row, 0), len(st.layers) - 1)
                self.layer_list.setCurrentRow(row)
            has = bool(st.layers)
            for w in (self.remove_button, self.up_button, self.down_button, self.model_combo,
                      self.table, self.known_box):
                w.setEnabled(has)
            self._sync_layer(row if has else -1)
        finally:
            self._updating = False

    def _sync_layer(self, row: int):
        layers = self.session.stack.layers
        if 0 <= row < len(layers):
            model = layers[row].material
            key = exact_choice(model)
            i = self.model_combo.findData(_CUSTOM)
            if key is None:
                if i < 0:
                    self.model_combo.addItem("", _CUSTOM)
                    i = self.model_combo.count() - 1
                self.model_combo.setItemText(i, f"{model_label(model)} (as loaded)")
                self.model_combo.setCurrentIndex(i)
            else:
                if i >= 0:
                    self.model_combo.removeItem(i)
                self.model_combo.setCurrentIndex(self.model_combo.findData(key))
        self.known_box.blockSignals(True)
        self.known_box.setChecked(0 <= row < len(layers) and layers[row].known)
        self.known_box.blockSignals(False)
        if self.table_model.layer_index != row:
            self.table_model.set_layer(row)
        self.table.resizeColumnsToContents()

    def selected_row(self) -> int:
        return self.layer_list.currentRow()

    # -- edits ------------------------------------------------------------------------------
    def _guard(self, title, fn, *a, **kw):
        try:
            return fn(*a, **kw)
        except PellucidError as exc:
            self.status.emit(str(exc), True)
            self.error.emit(title, str(exc))
            self.refresh()
            return None

    def _on_layer_selected(self, row):
        if not self._updating:
            self._sync_layer(row)

    def _on_substrate(self, _i):
        if self._updating:
            return
        key = self.substrate_combo.currentData()
        if key == _TABLE:
            path = self._table_file()
            if path is None:
                self.refresh()
                return
            self.set_substrate_table(path)
        elif key == _BARE:
            path = self._bare_file()
            if path is None:
                self.refresh()
                return
            self.set_substrate_bare(path)
        elif key:
            self._guard("Substrate not changed", self.session.set_substrate, key)

    def set_substrate_table(self, path):
        """Use a measured or handbook n, κ table as the substrate material."""
        from fitting.dispersion import Tabulated
        try:
            material = Tabulated.from_file(path)
        except PellucidError as exc:
            self.error.emit("Substrate not changed", str(exc))
            self.refresh()
            return False
        return self._guard("Substrate not changed", self.session.set_substrate,
                           material=material) is None and \
            self.session.stack.substrate.material is material

    def set_substrate_bare(self, path):
        """Use a measured T spectrum of the bare slide as the substrate.

        With a library glass selected, its n is kept and the spectrum gives the slide's
        own absorption κ(λ); otherwise the slide is taken as lossless and gives n(λ).
        """
        from fitting.bare_substrate import substrate_from_bare_spectrum
        from fitting.reader import read_spectrum
        old = self.session.stack.substrate
        base = old.material if old.library and old.library != "generic_glass" else None
        try:
            sub = substrate_from_bare_spectrum(read_spectrum(path),
                                               thickness_mm=old.thickness_mm, material=base)
        except PellucidError as exc:
            self.error.emit("Substrate not changed", str(exc))
            self.refresh()
            return False
        return self._guard("Substrate not changed", self.session.set_substrate,
                           material=sub.material) is None and \
            self.session.stack.substrate.material is sub.material

    def _bare_file(self):
        path, _ = QFileDialog.getOpenFileName(
            self, "Open the transmission spectrum of a bare slide", "",
            "Spectra (*.csv *.txt *.dat *.asc *.tsv);;All files (*)")
        return path or None

    def _on_substrate_thickness(self, v):
        if not self._updating:
            self._guard("Substrate not changed", self.session.set_substrate, thickness_mm=v)

    def _on_substrate_n(self, v):
        if not self._updating:
            self._guard("Substrate not changed", self.session.set_substrate, "generic_glass",
                        n=v)

    def _table_file(self):
        path, _ = QFileDialog.getOpenFileName(
            self, "Open an n, κ table", "",
            "n, κ tables (*.csv *.txt *.dat *.nk);;All files (*)")
        return path or None

    def add_layer(self, key: str, *, table_path=None):
        if key == "tabulated" and table_path is None:
            table_path = self._table_file()
            if table_path is None:
                return None
        row = max(self.selected_row(), 0)
        name = self._guard("Layer not added", self.session.add_layer, key, index=row,
                           table_path=table_path)
        if name is not None:
            self.layer_list.setCurrentRow(row)
            self.status.emit(f"Added layer '{name}'", False)
        return name

    def _on_known(self, on: bool):
        row = self.selected_row()
        if self._updating or row < 0:
            return
        self._guard("Layer not changed", self.session.set_layer_known, row, on)

    def _export_file(self):
        path, _ = QFileDialog.getOpenFileName(
            self, "Open the n, κ export of an earlier result", "",
            "n, κ exports (*_nk_*.csv);;n, κ tables (*.csv *.txt *.dat *.nk);;All files (*)")
        return path or None

    def _ask_thickness(self, path, *, start: bool) -> float | None:
        from pathlib import Path
        what = ("a start value for its thickness in nm (the fit adjusts it)" if start else
                "the layer's thickness in nm (from the earlier fit's report or another "
                "measurement); it is held in every fit")
        d, ok = QInputDialog.getDouble(
            self, "Thickness of the layer",
            f"{Path(path).name} carries no thickness, and no fit result of the same fit "
            f"lies beside it.\nEnter {what}:", 100.0, 0.001, 1e6, 2)
        return d if ok else None

    def load_known(self, path=None, *, fit_thickness: bool = False) -> str | None:
        """Add a layer from an earlier result's n, κ export above the selected layer.

        Its thickness comes from the fit result beside the table; when there is none,
        the user is asked for it. Held as known unless ``fit_thickness``. Returns the
        new layer's name (None if nothing was added).
        """
        from fitting.known import known_layer_from_export
        path = path or self._export_file()
        if path is None:
            return None
        # The table must cover what the fit will use: the spectrum within the fit range.
        spectrum, covers = self.session.spectrum, None
        if spectrum is not None:
            covers = spectrum.wavelength_nm
            rng = self.session.options.get("fit_range_nm")
            if rng is not None:
                covers = covers[(covers >= rng[0]) & (covers <= rng[1])]
        thickness = None
        while True:
            try:
                layer = known_layer_from_export(path, thickness, fit_thickness=fit_thickness,
                                                covers_nm=covers)
                break
            except ParameterError as exc:
                if exc.name == "thickness_nm" and exc.value is None and thickness is None:
                    thickness = self._ask_thickness(path, start=fit_thickness)
                    if thickness is not None:
                        continue
                    return None
                self.error.emit("Layer not added", str(exc))
                return None
            except PellucidError as exc:
                self.error.emit("Layer not added", str(exc))
                return None
        row = max(self.selected_row(), 0)
        name = self._guard("Layer not added", self.session.insert_layer, layer, index=row)
        if name is not None:
            self.layer_list.setCurrentRow(row)
            held = ("held as known" if layer.known else "its thickness will be fitted")
            self.status.emit(f"Added layer '{name}' with n, κ from {layer.source.get('file')}"
                             f" ({layer.thickness.value:.1f} nm, {held})", False)
        return name

    def _remove(self):
        row = self.selected_row()
        if row >= 0:
            self._guard("Layer not removed", self.session.remove_layer, row)

    def _move(self, delta):
        row = self.selected_row()
        if row >= 0:
            j = self.session.move_layer(row, delta)
            self.layer_list.setCurrentRow(j)

    def _on_model(self, _i):
        row = self.selected_row()
        key = self.model_combo.currentData()
        if row < 0 or key in (_CUSTOM, exact_choice(self.session.stack.layers[row].material)):
            return
        table = self._table_file() if key == "tabulated" else None
        if key == "tabulated" and table is None:
            self.refresh()
            return
        self._guard("Model not changed", self.session.set_layer_model, row, key,
                    table_path=table)

    def _rename(self, item):
        row = self.layer_list.row(item)
        old = self.session.stack.layers[row].name
        name, ok = QInputDialog.getText(self, "Rename layer",
                                        "Layer name (letters and digits, starting with a "
                                        "letter):", text=old)
        if ok and name and name != old:
            self._guard("Layer not renamed", self.session.rename_layer, row, name)
