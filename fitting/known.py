"""Known layers: films measured earlier, held as a whole while the others are fitted.

Two everyday cases: a two-layer sample whose lower film (an adhesion or barrier
layer measured on its own last week) is known, so only the top film is fitted;
and a film whose n, κ come from an earlier fit, reused with only its thickness
fitted.

:func:`known_layer_from_export` turns an earlier result's per-layer export
``<stem>_nk_<layer>.csv`` (:func:`fitting.export.export_result`) into a
:class:`~fitting.stack.Layer` whose material is the table
(:class:`~fitting.dispersion.Tabulated`, linear in wavelength). The thickness
comes from the result file ``<stem>_result.json`` beside the table when it is
there and belongs to the same fit (same provenance), else it must be given. The
table's file name and SHA-256, the earlier fit's provenance and where the
thickness came from are kept in :attr:`Layer.source`, which recipes save.

:func:`embed_table_files` does the same for a recipe that names a table file
(``{"kind": "tabulated", "file": "barrier_nk.csv"}``, relative to the recipe's
folder): the numbers are embedded, so a recipe saved beside batch results stays
self-contained.

What is refused, with the file, the line and what to do:

* a damaged table: a cut-off last line, text between rows, a missing value,
  n <= 0, κ < 0, a repeated wavelength, fewer than 2 rows, or fewer rows than
  the fit result beside it lists for that layer;
* a result file beside the table that belongs to another fit, or whose verdict
  was "poor" (its n, κ and thickness are not to be trusted);
* a spectrum reaching beyond the table: the table is never extrapolated
  (:class:`~fitting.errors.WavelengthRangeError` names both ranges).

A known layer's own uncertainty (that of the earlier fit) is recorded in the
source but not propagated into the new fit's uncertainty.
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path
from collections.abc import Mapping

import numpy as np

from .dispersion import Tabulated
from .errors import ParameterError, RecipeError, SpectrumFormatError, WavelengthRangeError
from .params import Param, check_finite
from .spectrum import sha256_of_file
from .stack import Layer

__all__ = ["known_layer_from_export", "read_nk_table", "check_table_covers",
           "embed_table_files", "EXPORT_NAME"]

#: File name of a per-layer n, κ export: ``<stem>_nk_<layer>.csv``.
EXPORT_NAME = re.compile(r"^(?P<stem>.+)_nk_(?P<layer>[A-Za-z][A-Za-z0-9]*)\.csv$", re.I)
#: Provenance keys the export's ``# key: value`` header shares with the result JSON.
_PROVENANCE = ("software", "recipe_hash", "input_file", "input_sha256", "created")
_LINE = re.compile(r"\bline (\d+)")


def read_nk_table(path) -> tuple[Tabulated, dict]:
    """An n, κ table file (a Pellucid export or any wavelength, n, κ table) as a material.

    Parameters
    ----------
    path : path
        Read by the spectrum reader's table parser (:meth:`Tabulated.from_file`).

    Returns
    -------
    material : Tabulated
        Named after the file (``describe()`` gives ``"table <file name>"``).
    info : dict
        ``sha256`` of the file's bytes, ``rows``, and ``meta``: the ``# key: value``
        lines above the table (an export's provenance and layer name).

    Raises
    ------
    SpectrumFormatError
        Naming the file (and line): missing, damaged (a cut-off last line or text
        between the rows), a non-finite, non-positive n or negative κ, repeated
        wavelengths, fewer than 2 rows.
    """
    from .reader import read_table
    path = Path(path)
    if not path.is_file():
        what = "is a folder, not a table file" if path.is_dir() else "file not found"
        raise SpectrumFormatError(path, None, f"{what}; give the n, κ table "
                                              "(<stem>_nk_<layer>.csv of an earlier result)")
    sha = sha256_of_file(path)
    table = read_table(path)
    for note in table.notes:
        # The reader keeps going past such lines for spectra; values that are to be
        # held as known must be the complete table as it was written.
        m = _LINE.search(note)
        raise SpectrumFormatError(path, int(m.group(1)) if m else None,
                                  f"the n, κ table is damaged: {note}. A known layer needs "
                                  "the complete table: export it again or repair the file")
    material = Tabulated.from_file(path)
    n_col = _n_column(table)
    bad = np.flatnonzero(~(table.values[:, n_col] > 0))
    if bad.size:
        raise table.fail(int(bad[0]), "n must be positive (n is about 1.3 to 4.5 for films); "
                         "this is not an n, κ table, or its columns are in another order",
                         expected="n > 0", found=f"{table.values[bad[0], n_col]:g}")
    material.name = path.name
    return material, {"sha256": sha, "rows": int(material.wl.size),
                      "meta": dict(table.metadata)}


def _n_column(table) -> int:
    """Index of the n column, found as :meth:`Tabulated.from_file` finds it."""
    names = [re.sub(r"[\s_]*[(\[].*$", "", n).strip().lower() for n in table.names]
    has_wl = any(re.match(r"\s*(wavelength|wave length|lambda|λ|wl\b)", n, re.I)
                 for n in table.names)
    return names.index("n") if has_wl and "n" in names else 1


def check_table_covers(material: Tabulated, wavelength_nm, *, label: str | None = None) -> None:
    """Refuse wavelengths outside the table (it is never extrapolated).

    Parameters
    ----------
    material : Tabulated
    wavelength_nm : array_like or Spectrum
        The spectrum's wavelengths (or anything with ``wavelength_nm``).
    label : str, optional
        How the table is named in the message (default: its file name).

    Raises
    ------
    WavelengthRangeError
        Naming the table and both ranges.
    """
    wl = np.asarray(getattr(wavelength_nm, "wavelength_nm", wavelength_nm), dtype=float)
    if wl.size == 0:
        return
    try:
        material.check_range(wl)
    except WavelengthRangeError:
        lo, hi = material.valid_nm
        raise WavelengthRangeError(label or f"the n, κ table {material.name}", lo, hi,
                                   float(np.min(wl)), float(np.max(wl))) from None


def _result_beside(path: Path, layer: str, info: dict) -> dict | None:
    """Thickness of ``layer`` from ``<stem>_result.json`` beside an n, κ export, or None.

    Checks that the result belongs to the same fit as the table (the provenance
    both carry) and lists as many n, κ rows for the layer as the table has.
    """
    m = EXPORT_NAME.match(path.name)
    if not m:
        return None
    jpath = path.with_name(f"{m.group('stem')}_result.json")
    if not jpath.is_file():
        return None
    try:
        doc = json.loads(jpath.read_text(encoding="utf-8"))
    except json.JSONDecodeError as e:
        raise SpectrumFormatError(jpath, e.lineno, f"the fit result beside {path.name} is not "
                                  f"valid JSON ({e.msg}); restore it, or give the thickness "
                                  "yourself") from None
    except (OSError, UnicodeDecodeError) as e:
        raise SpectrumFormatError(jpath, None, f"cannot be read ({e}); give the thickness "
                                               "yourself") from None
    if not isinstance(doc, Mapping):
        raise SpectrumFormatError(jpath, None, "is not a Pellucid fit result (no JSON object)")
    prov = doc.get("provenance") if isinstance(doc.get("provenance"), Mapping) else {}
    meta = info["meta"]
    differ = [k for k in _PROVENANCE if k in meta and prov.get(k) is not None
              and str(prov.get(k)) != meta[k]]
    if differ:
        raise SpectrumFormatError(
            jpath, None, f"belongs to another fit than {path.name} (their {differ[0]} "
            f"differ: {prov.get(differ[0])!r} and {meta[differ[0]]!r}); put the matching "
            "result file beside the table, or give the thickness yourself")
    params = doc.get("params") if isinstance(doc.get("params"), Mapping) else {}
    entry = params.get(f"{layer}_thickness")
    value = entry.get("value") if isinstance(entry, Mapping) else None
    if isinstance(value, bool) or not isinstance(value, (int, float)) \
            or not math.isfinite(value) or value <= 0:
        raise SpectrumFormatError(jpath, None, f"holds no usable thickness of layer {layer!r} "
                                               f"(found {value!r}); give the thickness yourself")
    optical = doc.get("optical") if isinstance(doc.get("optical"), Mapping) else {}
    oc = optical.get(layer) if isinstance(optical.get(layer), Mapping) else {}
    rows = oc.get("wavelength_nm")
    if isinstance(rows, list) and len(rows) != info["rows"]:
        raise SpectrumFormatError(
            path, None, f"has {info['rows']} rows of n, κ but the fit result beside it "
            f"({jpath.name}) lists {len(rows)} for layer {layer!r}: the table was cut short "
            "or edited; export it again")
    verdict = doc.get("verdict")
    if verdict == "poor":
        reasons = "; ".join(str(r) for r in (doc.get("verdict_reasons") or [])[:2])
        raise ParameterError(
            f"{layer}_thickness", value, f"the earlier fit ({jpath.name}) was judged poor"
            + (f" ({reasons})" if reasons else "") + ": its n, κ and thickness are not known "
            "values; fit that sample again first")
    stderr = entry.get("stderr")
    return {"value": float(value), "from": jpath.name, "sha256": sha256_of_file(jpath),
            "stderr": float(stderr) if isinstance(stderr, (int, float))
            and not isinstance(stderr, bool) and math.isfinite(stderr) else None,
            "verdict": verdict if isinstance(verdict, str) else None}


def _load(path, thickness_nm, *, require_thickness: bool):
    """(material, source, thickness) of a table file; thickness None if not found."""
    path = Path(path)
    material, info = read_nk_table(path)
    meta = info["meta"]
    m = EXPORT_NAME.match(path.name)
    export_layer = meta.get("layer") or (m.group("layer") if m else None)
    source = {"file": str(path), "sha256": info["sha256"]}
    if export_layer:
        source["layer"] = export_layer
    fit = {k: meta[k] for k in (*_PROVENANCE, "spectrum") if meta.get(k)}
    if fit:
        source["fit"] = fit
    if thickness_nm is not None:
        d = check_finite("thickness_nm", thickness_nm)
        if not d > 0:
            raise ParameterError("thickness_nm", d, "a known layer needs a positive "
                                                    "thickness in nm")
        source["thickness"] = {"value": d, "from": "given"}
        return material, source, d
    found = _result_beside(path, export_layer, info) if export_layer else None
    if found is None:
        if require_thickness:
            m_json = f" ({m.group('stem')}_result.json)" if m else ""
            raise ParameterError(
                "thickness_nm", None, f"{path} carries no thickness and no fit result"
                f"{m_json} lies beside it; give the known layer's thickness in nm")
        return material, source, None
    source["thickness"] = found
    return material, source, found["value"]


def known_layer_from_export(path, thickness_nm: float | None = None, *, name: str | None = None,
                            fit_thickness: bool = False, covers_nm=None) -> Layer:
    """A layer made from an earlier result's n, κ export, known as a whole by default.

    Parameters
    ----------
    path : path
        ``<stem>_nk_<layer>.csv`` written by :func:`fitting.export.export_result`
        (any wavelength, n, κ table is read too, but then the thickness must be given).
    thickness_nm : float, optional
        The layer's thickness. Default: the fitted thickness of that layer in
        ``<stem>_result.json`` beside the table, which must belong to the same fit.
    name : str, optional
        Layer name in the new stack (default: the layer's name in the export).
    fit_thickness : bool
        False (default): the layer is known as a whole (``known=True``). True:
        only its n, κ are reused and its thickness is fitted (``known=False``).
    covers_nm : array_like or Spectrum, optional
        The wavelengths the layer will be used on; refused now if the table does
        not cover them (else the fit refuses them).

    Returns
    -------
    Layer
        Material :class:`~fitting.dispersion.Tabulated`; ``source`` records the
        table's file and SHA-256, the earlier fit's provenance and where the
        thickness came from.

    Raises
    ------
    SpectrumFormatError
        The table (or the result beside it) is missing, damaged or belongs to
        another fit; names the file and line.
    ParameterError
        No thickness given and none beside the table; the earlier fit was "poor".
    WavelengthRangeError
        ``covers_nm`` reaches beyond the table.
    """
    material, source, d = _load(path, thickness_nm, require_thickness=True)
    if covers_nm is not None:
        check_table_covers(material, covers_nm, label=f"the n, κ table {path}")
    layer_name = name or source.get("layer") or "known"
    thickness = Param("thickness", d, 0.0, max(50000.0, 2 * d), "nm", "physical film thickness",
                      bool(fit_thickness))
    return Layer(layer_name, material, thickness, known=not fit_thickness, source=source)


def embed_table_files(stack: Mapping, base_dir=None, *, where: str = "stack"):
    """A stack dict with every layer's ``{"kind": "tabulated", "file": ...}`` read and embedded.

    For recipes: ``file`` is resolved from ``base_dir`` (the recipe's folder;
    default the working folder) unless absolute; the table's numbers replace
    it and the layer's ``source`` records the name as written and the file's
    SHA-256. A layer without a thickness takes it from the fit result beside
    the table (a known layer must have one or the other). Anything that is not
    such a layer is left for :meth:`Stack.from_dict` to check. The input is not
    modified.

    Raises
    ------
    RecipeError
        Naming the field (``stack.layers[1].material.file``) and, in the problem,
        the file, line and what to do.
    """
    if not isinstance(stack, Mapping) or not isinstance(stack.get("layers"), list) or not any(
            isinstance(ld, Mapping) and isinstance(ld.get("material"), Mapping)
            and "file" in ld["material"] for ld in stack["layers"]):
        return stack
    out = json.loads(json.dumps(stack))
    base = Path.cwd() if base_dir is None else Path(base_dir)
    for i, ld in enumerate(out["layers"]):
        mat = ld.get("material") if isinstance(ld, dict) else None
        if not isinstance(mat, dict) or "file" not in mat:
            continue
        w = f"{where}.layers[{i}]"
        if mat.get("kind") != "tabulated":
            raise RecipeError(f"{w}.material.file", 'only a table reads a file; set "kind": '
                                                    f'"tabulated" (found {mat.get("kind")!r})')
        extra = sorted(set(mat) - {"kind", "file"})
        if extra:
            why = ("give either a table file or the table's numbers, not both"
                   if set(extra) & {"wavelength_nm", "n", "k"} else
                   "unknown field beside a table file (only kind and file)")
            raise RecipeError(f"{w}.material.{extra[0]}", why)
        name = mat["file"]
        if not isinstance(name, str) or not name.strip():
            raise RecipeError(f"{w}.material.file", f"must be a file path (text), got {name!r}")
        p = Path(name.strip()).expanduser()
        p = p if p.is_absolute() else base / p
        if not p.is_file():
            hint = "" if Path(name).is_absolute() else \
                " (a relative path is read from the folder of the recipe file)"
            raise RecipeError(f"{w}.material.file",
                              f"the n, κ table {str(p)!r} does not exist{hint}; check the path")
        known = ld.get("known") is True
        th = ld.get("thickness")
        given = th.get("value") if isinstance(th, Mapping) else th
        if isinstance(given, bool) or not isinstance(given, (int, float)):
            given = None          # a wrong type is named later by Stack.from_dict
        try:
            material, source, d = _load(p, given, require_thickness=known)
        except ParameterError as e:
            fld = f"{w}.thickness" if e.value is None else f"{w}.material.file"
            raise RecipeError(fld, e.reason if e.value is None else str(e)) from None
        except (SpectrumFormatError, WavelengthRangeError) as e:
            raise RecipeError(f"{w}.material.file", str(e)) from None
        source["file"] = name.strip()          # as written: the recipe moves with its tables
        ld["material"] = material.to_dict()
        ld["source"] = source
        if given is None and d is not None:
            entry = dict(th) if isinstance(th, Mapping) else {}
            entry.setdefault("min", 0.0)
            entry.setdefault("max", max(50000.0, 2 * d))
            entry.setdefault("vary", not known)
            entry["value"] = d
            ld["thickness"] = entry
    return out
