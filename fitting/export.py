"""Files a process engineer receives for one fitted spectrum.

:func:`export_result` writes, for one :class:`~fitting.result.FitResult`:

=========================  ==========================================================
``<stem>_nk_<layer>.csv``  n, κ, α with 1σ per wavelength, one file per film layer
``<stem>_curves.csv``      measured, fitted and residual T or R (fractions), σ, mask
``<stem>_result.json``     parameters with σ, correlation matrix, curves, provenance
``<stem>_report.txt``      the fixed-section text report (:meth:`FitResult.report`)
``<stem>_fit.<fmt>``       measured vs fitted with residuals (:func:`plots.fit_figure`)
``<stem>_optical.<fmt>``   n and κ with 1σ bands (:func:`plots.optical_figure`)
``<stem>_tauc.<fmt>``      Tauc plot, only if the fit found a band gap
``<stem>_report.pdf``      the one- or two-page PDF report (part ``"pdf"``, asked for
                           explicitly: :func:`fitting.report.write_fit_report`)
=========================  ==========================================================

Every file carries the same provenance (software version, recipe hash, input file
and its SHA-256, creation time in UTC): ``# key: value`` lines on top of CSV and
text files, a ``provenance`` object in JSON and metadata plus a footer line in
figures. Every write is atomic (:mod:`fitting.atomic`), so an interrupted export
leaves the previous files intact.

CSV files are plain comma-separated numbers with one header line of column names
carrying units after any ``#`` lines, so ``numpy.loadtxt(path, delimiter=",",
skiprows=<header line + 1>)`` or a spreadsheet reads them; ``nan`` marks an
uncertainty that could not be estimated.
"""

from __future__ import annotations

import io
import math
import re
import secrets
from datetime import UTC, datetime
from pathlib import Path
from collections.abc import Mapping, Sequence

import numpy as np

from . import __version__
from .atomic import atomic_write_bytes, atomic_write_text, sync_dir
from .jsonsafe import json_safe, json_text
from .spectrum import sha256_of_file

__all__ = ["make_provenance", "export_result", "save_figure", "provenance_footer",
           "read_table_csv", "read_nk_csv", "read_curves_csv", "NK_COLUMNS", "CURVE_COLUMNS",
           "curve_columns",
           "PLOT_FORMATS", "PARTS"]

#: Column names (with units) of the optical-constants CSV.
NK_COLUMNS = ("wavelength_nm", "n", "n_sigma", "k", "k_sigma", "alpha_cm-1", "alpha_sigma_cm-1")


def curve_columns(quantity: str = "T") -> tuple[str, ...]:
    """Column names of the curves CSV for a fit of ``quantity`` ("T" or "R"): the
    measured, fitted, residual and σ columns carry the quantity and ``_fraction``
    (1.0 = 100 %); ``used`` is 1 for a point that took part in the fit, else 0."""
    q = str(quantity or "T")
    return ("wavelength_nm", *(f"{c}_{q}_fraction" for c in ("measured", "fitted", "residual",
                                                            "sigma")), "used")


#: Column names of the curves CSV of a transmittance fit (see :func:`curve_columns`).
CURVE_COLUMNS = curve_columns("T")
PLOT_FORMATS = ("png", "svg", "pdf")
#: The parts :func:`export_result` can write (the names of a recipe's ``outputs.exports``,
#: and "pdf", the single-fit PDF report, which is written only when asked for).
PARTS = ("nk", "curves", "json", "report", "plots", "pdf")
_DEFAULT_PARTS = ("nk", "curves", "json", "report", "plots")
_PROV_KEYS = ("software", "recipe_hash", "input_file", "input_sha256", "created")
_STEM_RE = re.compile(r"^[^/\\\x00]+$")


# -- provenance -----------------------------------------------------------------------
def make_provenance(result=None, *, recipe_hash: str | None = None, input_path=None,
                    recipe_name: str | None = None, created: datetime | None = None) -> dict:
    """The provenance record written into every export.

    Parameters
    ----------
    result : FitResult, optional
        Supplies the input file and hash from ``result.spectrum`` when ``input_path``
        is not given.
    recipe_hash : str, optional
        Hash of the recipe that produced the fit (the recipe module computes it).
    input_path : path, optional
        The measured file; its SHA-256 is computed from its bytes here.
    recipe_name : str, optional
        Added as ``recipe_name`` when given.
    created : datetime, optional
        Default now; always written as ISO-8601 UTC.

    Returns
    -------
    dict
        ``{"software": "pellucid X", "recipe_hash", "input_file", "input_sha256",
        "created"}`` (plus ``recipe_name``); unknown values are ``None``.
    """
    spec = dict(getattr(result, "spectrum", None) or {})
    if input_path is not None:
        input_file, sha = str(input_path), sha256_of_file(input_path)
    else:
        input_file = spec.get("source") or spec.get("path") or None
        sha = spec.get("sha256") or None
    when = created or datetime.now(UTC)
    if when.tzinfo is None:
        when = when.replace(tzinfo=UTC)
    prov = {"software": f"pellucid {__version__}", "recipe_hash": recipe_hash,
            "input_file": input_file, "input_sha256": sha,
            "created": when.astimezone(UTC).isoformat(timespec="seconds")}
    if recipe_name is not None:
        prov["recipe_name"] = recipe_name
    return prov


def _prov_lines(provenance: Mapping, extra: Mapping | None = None) -> list[str]:
    items = {**{k: provenance.get(k) for k in _PROV_KEYS},
             **{k: v for k, v in provenance.items() if k not in _PROV_KEYS}, **(extra or {})}
    return [f"# {k}: {'' if v is None else _one_line(v)}" for k, v in items.items()]


def _one_line(v) -> str:
    return " ".join(str(v).split())


def provenance_footer(provenance: Mapping | None) -> str:
    """One short line for figure footers: software, recipe hash, input hash, time."""
    if not provenance:
        return ""
    parts = [provenance.get("software") or ""]
    if provenance.get("recipe_hash"):
        parts.append(f"recipe {str(provenance['recipe_hash'])[:12]}")
    if provenance.get("input_sha256"):
        parts.append(f"input sha256 {str(provenance['input_sha256'])[:12]}…")
    if provenance.get("created"):
        parts.append(str(provenance["created"]))
    return "  ·  ".join(p for p in parts if p)


# -- writers --------------------------------------------------------------------------
# Stands in for a run of numbers inside the JSON until the encoder is done: private-use
# characters and a random part, so no text of a result can look like it.
_MARK = f"\ue000{secrets.token_hex(8)}:"
_MARKS = re.compile(f'"{_MARK}(\\d+)\ue001"')


class _NumberText:
    """The text of each run of numbers an export writes, made once per run.

    The same arrays go into several files of one fit (the wavelengths into all of
    them, n and κ into the n, κ table and the JSON), and turning a double into its
    shortest text (``repr``) is most of an export's time. Runs are keyed by their
    bytes, so equal arrays share one text and -0.0 stays apart from 0.0.
    """

    def __init__(self):
        self._texts: dict = {}
        self._runs: list = []

    def texts(self, values, missing: str) -> list:
        """repr of each value (the shortest text that reads back to the same double),
        ``missing`` where the value is not finite."""
        a = np.ascontiguousarray(values, dtype=float)
        key = a.tobytes()
        known = self._texts.get(key)
        if known is None:
            bad = np.flatnonzero(~np.isfinite(a))
            if bad.size == a.size:           # a column never estimated: no text to make
                known = (None, None, {})
            else:
                known = (list(map(repr, a.tolist())), bad.tolist() if bad.size else None, {})
            self._texts[key] = known
        texts, bad, filled = known
        if bad is None and texts is not None:
            return texts
        if missing not in filled:
            if texts is None:
                filled[missing] = [missing] * a.size
            else:
                cells = filled[missing] = texts.copy()
                for i in bad:
                    cells[i] = missing
        return filled[missing]

    def csv_column(self, values) -> list:
        """Cells of a CSV column; ``nan`` for a value that is not finite."""
        return self.texts(values, "nan")

    def json_run(self, values) -> str:
        """A stand-in for ``json_safe(..., runs=)``; :meth:`fill` puts the run's text
        (``null`` for a value that is not finite) in its place."""
        self._runs.append("[" + ", ".join(self.texts(values, "null")) + "]")
        return f"{_MARK}{len(self._runs) - 1}\ue001"

    def fill(self, text: str) -> str:
        """``text`` with each stand-in (as the JSON encoder wrote it) replaced by its run."""
        runs, self._runs = self._runs, []
        return _MARKS.sub(lambda m: runs[int(m.group(1))], text)


def _csv_text(columns: Sequence[str], data: np.ndarray, header: list[str],
              numbers: _NumberText | None = None) -> str:
    """CSV text: the header lines, the column names, one row per line; every value
    as its ``repr`` (the shortest text that reads back to the same double), ``nan``
    where it is not finite."""
    data = np.asarray(data, dtype=float)
    numbers = numbers or _NumberText()
    cells = [numbers.csv_column(data[:, j]) for j in range(data.shape[1])]
    lines = [*header, ",".join(columns), *map(",".join, zip(*cells))]
    return "\n".join(lines) + "\n"


def _num(x) -> str:
    x = float(x)
    if not math.isfinite(x):
        return "nan"
    return repr(x)     # shortest text that reads back to the same double


def _col(a, size):
    return np.full(size, np.nan) if a is None else np.asarray(a, dtype=float)


def _json_text(doc: Mapping, numbers: _NumberText | None = None) -> str:
    """Strict JSON of ``doc`` (cleaned here by :func:`json_safe`) laid out for reading
    (:func:`fitting.jsonsafe.json_text`), with the long runs of numbers written from
    ``numbers``' texts, which the CSV files of the same fit share."""
    numbers = numbers or _NumberText()
    return numbers.fill(json_text(json_safe(doc, runs=numbers.json_run)))


def save_figure(fig, path, *, provenance: Mapping | None = None, fmt: str | None = None,
                dpi: int = 150, sync_dir: bool = True) -> Path:
    """Save a Figure atomically, with provenance as file metadata and a footer line.

    The figure is rendered to memory first, so a failing render never touches an
    existing file.
    """
    from matplotlib.layout_engine import ConstrainedLayoutEngine

    path = Path(path)
    fmt = (fmt or path.suffix.lstrip(".")).lower()
    if fmt not in PLOT_FORMATS:
        raise ValueError(f"plot format {fmt!r} is not supported; use one of {PLOT_FORMATS}")
    prov = dict(provenance or {})
    footer = provenance_footer(prov)
    # The footer is added for this save only, so a GUI figure is left as it was; a
    # constrained layout is told to keep a strip free for it.
    label, engine, old_rect = None, fig.get_layout_engine(), None
    if footer:
        label = fig.text(0.995, 0.004, footer, ha="right", va="bottom", fontsize=6,
                         color="#888888")
        if isinstance(engine, ConstrainedLayoutEngine):
            old_rect = engine.get()["rect"]
            strip = 11.0 / (72.0 * fig.get_figheight())
            engine.set(rect=(0, strip, 1, 1 - strip))
    desc = "; ".join(f"{k}={prov[k]}" for k in _PROV_KEYS if prov.get(k))
    software = prov.get("software") or f"pellucid {__version__}"
    if fmt == "png":
        meta = {"Software": software, "Description": desc}
        if prov.get("created"):
            meta["Creation Time"] = prov["created"]
    elif fmt == "svg":
        meta = {"Creator": software, "Description": desc}
        if prov.get("created"):
            meta["Date"] = prov["created"]
    else:
        meta = {"Creator": software, "Subject": desc}
    buf = io.BytesIO()
    try:
        fig.savefig(buf, format=fmt, dpi=dpi, metadata=meta)
    finally:
        if label is not None:
            label.remove()
        if old_rect is not None:
            engine.set(rect=old_rect)
    return atomic_write_bytes(path, buf.getvalue(), sync_dir=sync_dir)


def _write_curves(result, path, prov, name, numbers: _NumberText | None = None):
    wl = np.asarray(result.wavelength_nm, dtype=float)
    data = np.column_stack([wl, _col(result.measured, wl.size), _col(result.fitted, wl.size),
                            _col(result.residuals, wl.size), _col(result.sigma, wl.size),
                            np.asarray(result.used, dtype=float)])
    header = _prov_lines(prov, {"spectrum": name, "quantity": result.quantity,
                                "columns": f"wavelength in nm; measured, fitted, residual "
                                           f"(measured - fitted) and sigma of {result.quantity} "
                                           "as fractions (1.0 = 100 %); used = 1 if the point "
                                           "took part in the fit"})
    atomic_write_text(path, _csv_text(curve_columns(result.quantity), data, header, numbers),
                      sync_dir=False)


def export_result(result, out_dir, *, stem: str, provenance: Mapping,
                  plots: Sequence[str] = ("png",),
                  parts: Sequence[str] = _DEFAULT_PARTS) -> list[Path]:
    """Write every export file of one fit into ``out_dir``.

    Parameters
    ----------
    result : FitResult
    out_dir : path
        Created if missing.
    stem : str
        File-name prefix (usually the spectrum file's stem); no path separators.
    provenance : dict
        From :func:`make_provenance`; written into every file.
    plots : sequence of {"png", "svg", "pdf"}
        Figure formats; empty for none.
    parts : sequence of {"nk", "curves", "json", "report", "plots", "pdf"}
        Which files to write (a recipe's ``outputs.exports``); default all but "pdf".

    Returns
    -------
    list of Path
        The files written, in writing order (see the module docstring for names).
    """
    if not stem or not _STEM_RE.match(stem) or stem in (".", ".."):
        raise ValueError(f"export stem {stem!r} must be a plain file-name prefix "
                         "without '/' or '\\'")
    plots = tuple(str(p).lower().lstrip(".") for p in plots)
    bad = [p for p in plots if p not in PLOT_FORMATS]
    if bad:
        raise ValueError(f"plot format {bad[0]!r} is not supported; use one of {PLOT_FORMATS}")
    unknown = [p for p in parts if p not in PARTS]
    if unknown:
        raise ValueError(f"export part {unknown[0]!r} is unknown; choose from {PARTS}")
    if "plots" not in parts:
        plots = ()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    prov = dict(provenance)
    name = (result.spectrum or {}).get("name") or stem
    numbers = _NumberText()            # each array's text made once for all the files
    written: list[Path] = []
    if "pdf" in parts:
        from .report import write_fit_report   # matplotlib only when a PDF is asked for
        written.append(write_fit_report(result, out / f"{stem}_report.pdf", provenance=prov))

    for layer, oc in (result.optical.items() if "nk" in parts else ()):
        wl = np.asarray(oc.wavelength_nm, dtype=float)
        cols = [wl, oc.n, oc.n_sigma, oc.k, oc.k_sigma, oc.alpha_cm, oc.alpha_sigma]
        data = np.column_stack([_col(c, wl.size) for c in cols])
        header = _prov_lines(prov, {"spectrum": name, "layer": layer,
                                    "columns": "wavelength in nm; n, k dimensionless; alpha = "
                                               "4*pi*k/wavelength in 1/cm; *_sigma = 1-sigma "
                                               "from the fit covariance (nan = not estimated)"})
        written.append(atomic_write_text(out / f"{stem}_nk_{layer}.csv",
                                         _csv_text(NK_COLUMNS, data, header, numbers),
                                         sync_dir=False))

    if "curves" in parts:
        _write_curves(result, out / f"{stem}_curves.csv", prov, name, numbers)
        written.append(out / f"{stem}_curves.csv")
    if "json" in parts:
        doc = result.to_dict(curves=True)
        doc["provenance"] = prov
        written.append(atomic_write_text(out / f"{stem}_result.json",
                                         _json_text(doc, numbers), sync_dir=False))
    if "report" in parts:
        text = "\n".join(["Pellucid fit report", f"spectrum: {name}",
                          *(line[2:] for line in _prov_lines(prov)), "", result.report(), ""])
        written.append(atomic_write_text(out / f"{stem}_report.txt", text, sync_dir=False))
    if plots:
        from . import plots as P   # matplotlib only when figures are asked for
        figures = [("fit", lambda: P.fit_figure(result))]
        if result.optical:
            figures.append(("optical", lambda: P.optical_figure(result, alpha=True)))
        if result.band_gap is not None:
            figures.append(("tauc", lambda: P.tauc_figure(result)))
        for kind, build in figures:
            fig = build()
            for fmt in plots:
                written.append(save_figure(fig, out / f"{stem}_{kind}.{fmt}", provenance=prov,
                                           fmt=fmt, sync_dir=False))
    sync_dir(out)        # every rename above made durable at once
    return written


# -- readers (used by the batch report; handy for engineers' own scripts) ---------------
def read_table_csv(path) -> tuple[dict, list[str], np.ndarray]:
    """Read an export CSV: (``# key: value`` metadata, column names, 2-D float array)."""
    path = Path(path)
    meta: dict[str, str] = {}
    with open(path, encoding="utf-8") as fh:
        lines = fh.read().splitlines()
    i = 0
    while i < len(lines) and lines[i].startswith("#"):
        key, _, value = lines[i][1:].partition(":")
        meta[key.strip()] = value.strip()
        i += 1
    if i >= len(lines):
        raise ValueError(f"{path}: no column header line after the '#' lines")
    names = [c.strip() for c in lines[i].split(",")]
    rows = []
    for j, ln in enumerate(lines[i + 1:], start=i + 2):
        if not ln.strip():
            continue
        cells = ln.split(",")
        if len(cells) != len(names):
            raise ValueError(f"{path}, line {j}: {len(cells)} values where the header has "
                             f"{len(names)} columns; the file was cut short or edited")
        try:
            rows.append([float(x) for x in cells])
        except ValueError:
            raise ValueError(f"{path}, line {j}: a value is not a number ({ln[:60]!r}); "
                             "the file was edited by hand or damaged") from None
    data = np.array(rows, dtype=float) if rows else np.empty((0, len(names)))
    return meta, names, data


def read_nk_csv(path) -> dict:
    """One layer's optical constants from ``<stem>_nk_<layer>.csv`` as a mapping that
    :mod:`fitting.plots` accepts (``wavelength_nm``, ``n``, ``k``, ... , ``name``)."""
    meta, names, data = read_table_csv(path)
    col = {c: data[:, i] for i, c in enumerate(names)}
    return {"name": meta.get("spectrum", Path(path).stem), "layer": meta.get("layer", ""),
            "wavelength_nm": col["wavelength_nm"], "n": col["n"], "k": col["k"],
            "n_sigma": col.get("n_sigma"), "k_sigma": col.get("k_sigma"),
            "alpha_cm": col.get("alpha_cm-1"), "alpha_sigma": col.get("alpha_sigma_cm-1"),
            "meta": meta}


_CURVE_NAME = re.compile(r"^(measured|fitted|residual|sigma)(?:_([TR])_fraction)?$")


def read_curves_csv(path) -> dict:
    """The fitted spectrum from ``<stem>_curves.csv`` as a mapping for
    :func:`fitting.plots.fit_figure`.

    Reads the column names of :func:`curve_columns` and also the bare ``measured``,
    ``fitted``, ``residual``, ``sigma`` of files from earlier builds of this version.
    """
    meta, names, data = read_table_csv(path)
    col, quantity = {}, None
    for i, c in enumerate(names):
        m = _CURVE_NAME.match(c)
        if m:
            col[m.group(1)] = data[:, i]
            quantity = quantity or m.group(2)
        else:
            col[c] = data[:, i]
    missing = [c for c in ("wavelength_nm", "measured", "fitted") if c not in col]
    if missing:
        raise ValueError(f"{path}: not a curves file of Pellucid; column(s) {missing} missing "
                         f"(found {names})")
    return {"name": meta.get("spectrum", Path(path).stem),
            "quantity": meta.get("quantity") or quantity or "T",
            "wavelength_nm": col["wavelength_nm"], "measured": col["measured"],
            "fitted": col["fitted"], "residuals": col.get("residual"),
            "sigma": col.get("sigma"), "used": col["used"] > 0.5 if "used" in col else None,
            "meta": meta}
