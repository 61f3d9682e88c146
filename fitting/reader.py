"""Reading and writing spectra stored as delimited text tables.

Spectrometer exports differ in everything but content: the column separator
(comma, semicolon, tab, spaces), the decimal mark (``450.5`` or ``450,5``),
thousands separators, text encodings (UTF-8, UTF-16, Latin-1), header and
metadata blocks, abscissa units (nm, µm, Å, cm⁻¹, eV), the ordinate (T or R,
fraction or percent, absorbance), sort order and the odd blank or broken row.
This module finds all of that out from the file, says what it found
(:func:`sniff`, :func:`preview`) and returns one normalised
:class:`~fitting.spectrum.Spectrum`: ascending wavelengths in nm and values as
a fraction. Everything it decides can be overridden with :class:`ReaderOptions`,
which recipes store as JSON.

Unreadable input raises :class:`~fitting.errors.SpectrumFormatError` naming the
file, the line, what was expected and what was found; problems that do not stop
reading go into ``Spectrum.warnings`` with their line numbers: dropped rows,
values above 100 %, a text line between data rows ("Lamp change", skipped), a
text column ("PMT" / "InGaAs", ignored), a last row cut off without a line
break (dropped). Nothing non-finite or non-positive ever reaches a spectrum.

Parsing is two-stage: the dialect is sniffed from the first lines in Python,
then the data block is parsed in one vectorised call (:func:`numpy.loadtxt`).
Only files the fast path refuses (missing values, comments or quotes inside the
data, thousands separators) take the exact line-by-line path, which is also the
one that reports errors. The work is bounded: the table must start within the
first :data:`_MAX_HEAD_LINES` lines (a file that is no spectrum is refused
without reading the rest), rows of more than :data:`_MAX_COLUMNS` fields are
refused without parsing their cells, and every later step is linear in the size
of the file. ``tools/fuzz_reader.py`` checks all of this on mutated exports.
"""

from __future__ import annotations

import codecs
import csv
import hashlib
import io
import math
import os
import re
import time
import unicodedata
import warnings as _warnings
from dataclasses import asdict, dataclass, fields, replace
from pathlib import Path

import numpy as np

from .atomic import atomic_write_bytes
from .errors import ParameterError, RecipeError, SpectrumFormatError
from .reference import MIN_POINTS, estimate_noise, reference_correct
from .spectrum import Spectrum
from .units import ev_to_nm, nm_to_ev, nm_to_wavenumber, wavenumber_to_nm

__all__ = [
    "Dialect", "Preview", "ReaderOptions", "read_spectrum", "parse_spectrum", "sniff",
    "preview", "write_spectrum", "reference_correct", "estimate_noise", "to_nm", "from_nm",
    "Table", "read_table", "abscissa_unit",
    "X_UNITS", "Y_KINDS", "DELIMITERS", "ENCODINGS", "METADATA_STYLES",
]

#: Abscissa units understood everywhere ("um" is µm, "A" is Å).
X_UNITS = ("nm", "um", "A", "cm-1", "eV")
#: Ordinate kinds. "counts" is a raw detector signal, kept as read, for
#: :func:`~fitting.reference.reference_correct`.
Y_KINDS = ("T_fraction", "T_percent", "absorbance", "R_fraction", "R_percent", "counts")
#: Column separators; " " means any run of spaces or tabs.
DELIMITERS = ("\t", ";", ",", " ")
DECIMALS = (".", ",")
ENCODINGS = ("utf-8", "utf-8-sig", "utf-16-le", "utf-16-be", "utf-32-le", "utf-32-be",
             "latin-1", "cp1252")
#: How metadata lines look: "Key: value", "Key=value", "# Key: value",
#: "Key<delimiter>value", or no metadata block at all.
METADATA_STYLES = ("colon", "equals", "comment", "delimited", "none")
X_ORDERS = ("ascending", "descending", "unsorted")
NEWLINES = ("\n", "\r\n", "\r")

_DELIMITER_NAMES = {"\t": "tab", ";": "';'", ",": "','", " ": "spaces"}
_DELIMITER_ALIASES = {"tab": "\t", "\\t": "\t", "semicolon": ";", "comma": ",",
                      "space": " ", "spaces": " ", "whitespace": " "}
_ENCODING_ALIASES = {"utf8": "utf-8", "utf-8": "utf-8", "utf-8-sig": "utf-8-sig",
                     "utf-16-le": "utf-16-le", "utf-16le": "utf-16-le",
                     "utf-16-be": "utf-16-be", "utf-16be": "utf-16-be",
                     "utf-32-le": "utf-32-le", "utf-32le": "utf-32-le",
                     "utf-32-be": "utf-32-be", "utf-32be": "utf-32-be",
                     "latin-1": "latin-1", "latin1": "latin-1", "iso-8859-1": "latin-1",
                     "cp1252": "cp1252", "windows-1252": "cp1252"}

#: Lines scanned to sniff the dialect; grown (x8) if the header is longer.
_SNIFF_LINES = 400
#: The table must start within this head of the file; past it the file is refused
#: without reading further, so the work spent on a file that is no spectrum is bounded.
_MAX_HEAD_LINES = 25_600
_MAX_HEAD_CHARS = 1_000_000
#: A line this long is not a row of a spectrum table.
_MAX_LINE = 100_000
#: More columns than this is no spectrum export (and would make every row costly).
_MAX_COLUMNS = 256
#: Text lines between data rows ("Lamp change") skipped with a note; more is refused.
_MAX_STRAY = 20
#: Footer lines kept in the metadata.
_MAX_FOOTER = 200


# --------------------------------------------------------------------------- units

def to_nm(x, unit: str) -> np.ndarray:
    """Convert abscissa values in ``unit`` (one of :data:`X_UNITS`) to wavelength in nm.

    Wavenumber: lambda[nm] = 1e7 / nu[cm^-1]; photon energy:
    lambda[nm] = hc / E with hc = :data:`fitting.units.HC_EV_NM` eV nm (CODATA 2018).
    Vacuum wavelengths throughout.
    """
    x = np.asarray(x, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if unit == "nm":
            return x.copy()
        if unit == "um":
            return x * 1e3
        if unit == "A":
            return x * 0.1
        if unit == "cm-1":
            return wavenumber_to_nm(x)
        if unit == "eV":
            return ev_to_nm(x)
    raise ParameterError("x_unit", unit, f"must be one of {X_UNITS}")


def from_nm(wavelength_nm, unit: str) -> np.ndarray:
    """Inverse of :func:`to_nm`: wavelength in nm to abscissa values in ``unit``."""
    wl = np.asarray(wavelength_nm, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if unit == "nm":
            return wl.copy()
        if unit == "um":
            return wl * 1e-3
        if unit == "A":
            return wl * 10.0
        if unit == "cm-1":
            return nm_to_wavenumber(wl)
        if unit == "eV":
            return nm_to_ev(wl)
    raise ParameterError("x_unit", unit, f"must be one of {X_UNITS}")


def _to_fraction(y: np.ndarray, kind: str) -> np.ndarray:
    with np.errstate(over="ignore", invalid="ignore"):
        if kind in ("T_percent", "R_percent"):
            return y / 100.0
        if kind == "absorbance":        # A = -log10(T)
            return np.power(10.0, -y)
    return y.copy()


def _from_fraction(v: np.ndarray, kind: str) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        if kind in ("T_percent", "R_percent"):
            return v * 100.0
        if kind == "absorbance":
            return -np.log10(v)
    return v.copy()


def _norm_text(s: str) -> str:
    """Lower-case, compatibility-normalised text (µ -> μ, Å sign -> Å, ⁻¹ -> -1)."""
    s = unicodedata.normalize("NFKC", s).lower()
    return s.replace("\u2212", "-").replace("\u2011", "-").replace("\u2010", "-").strip()


_UNIT_WORDS = {
    "nm": "nm", "nanometer": "nm", "nanometers": "nm", "nanometre": "nm", "nanometres": "nm",
    "μm": "um", "um": "um", "micron": "um", "microns": "um", "micrometer": "um",
    "micrometers": "um", "micrometre": "um", "micrometres": "um", "mum": "um",
    "å": "A", "angstrom": "A", "angstroms": "A", "ångström": "A", "ångströms": "A",
    "angstroem": "A",
    "cm-1": "cm-1", "1/cm": "cm-1", "/cm": "cm-1", "wavenumber": "cm-1", "wavenumbers": "cm-1",
    "ev": "eV", "electronvolt": "eV", "electronvolts": "eV", "electron volt": "eV",
    "electron volts": "eV",
}
_CM1 = re.compile(r"cm\s*(\^|\*\*)?\s*\(?\s*-\s*1\s*\)?", re.ASCII)
_BRACKETED = re.compile(r"[(\[{]([^)\]}]*)[)\]}]")
_X_NAME_WORDS = ("wavelength", "wave length", "lambda", "λ", "wavenumber", "wave number",
                 "energy", "photon energy")


def _unit_word(s: str) -> str | None:
    s = _CM1.sub("cm-1", _norm_text(s)).strip(" .")
    return _UNIT_WORDS.get(s)


def _abscissa_label(label: str) -> tuple[bool, str | None]:
    """(looks like an abscissa, unit or None) for a column name or metadata value."""
    s = _CM1.sub("cm-1", _norm_text(label))
    if not s:
        return False, None
    name = _BRACKETED.sub(" ", s).strip()
    parts = [m.group(1) for m in _BRACKETED.finditer(s)]
    if "/" in name:                      # "Energy/eV", "lambda / nm" (but not "1/cm")
        head, _, tail = name.rpartition("/")
        if head.strip() and head.strip() not in ("1", ""):
            parts.append(tail)
            name = head.strip()
    m = re.search(r"\bin\s+(\S+)$", name)
    if m:                                # "wavelength in nm"
        parts.append(m.group(1))
        name = name[:m.start()].strip()
    named = name in ("x", "wl", "lam") or any(w in name for w in _X_NAME_WORDS)
    unit = None
    for part in parts:
        unit = _unit_word(part)
        if unit is None and part.strip() == "a" and named:
            unit = "A"                   # "Wavelength (A)": Å, only beside a wavelength name
        if unit:
            break
    if unit is None:
        unit = _unit_word(name)          # bare "nm", "NANOMETERS", "1/CM"
        if unit is not None:
            return True, unit
    if unit is None and named:
        if "wavenumber" in name or "wave number" in name:
            unit = "cm-1"
        elif "energy" in name:
            unit = "eV"
    return named or unit is not None, unit


_T_WORDS = {"t", "tr", "trans", "transmittance", "transmission", "transmittances",
            "transmissivity", "transmittivity", "tt"}
_R_WORDS = {"r", "refl", "reflectance", "reflection", "reflectivity", "reflectances", "rr"}
_A_WORDS = {"a", "abs", "absorbance", "od", "absorbances", "extinction"}
_COUNT_WORDS = {"counts", "count", "signal", "intensity", "cts", "raw", "adu"}


def _ordinate_label(label: str) -> tuple[str, str | None] | None:
    """Ordinate kind a column name or metadata value states, or None.

    Returns ``(what, scale)`` with ``what`` in {"T", "R", "absorbance", "counts"}
    and ``scale`` "percent", "fraction" or None (not stated).
    """
    s = _norm_text(label)
    if not s:
        return None
    percent = "%" in s or "percent" in s
    words = re.findall(r"[a-z]+", s.replace("a.u.", " "), re.ASCII)
    bare = re.findall(r"[a-z]+", _BRACKETED.sub(" ", s).replace("a.u.", " "), re.ASCII)
    scale = "percent" if percent else ("fraction" if "fraction" in words else None)
    if "optical density" in s or any(w in _A_WORDS - {"a"} for w in bare) or bare == ["a"]:
        return "absorbance", None
    if any(w in _R_WORDS for w in bare):
        return "R", scale
    if any(w in _T_WORDS for w in bare):
        return "T", scale
    if any(w in _COUNT_WORDS for w in words):
        return "counts", None
    if bare == [] and percent:           # a bare "%" column
        return "T", "percent"
    return None


def _kind_from(what: str, scale: str | None) -> str | None:
    if what in ("absorbance", "counts"):
        return what
    if scale is None:
        return None
    return f"{what}_{'percent' if scale == 'percent' else 'fraction'}"


# --------------------------------------------------------------------------- dialect

@dataclass(frozen=True)
class Dialect:
    """How a spectrum table is laid out in a text file.

    :func:`sniff` reports the dialect of a file; :func:`write_spectrum` writes
    one. The fields above ``header_lines`` describe the format and are used by
    both; ``header_lines`` and below are what sniffing found in one file and are
    ignored when writing.

    Parameters
    ----------
    delimiter : {"\\t", ";", ",", " "}
        Column separator; " " means any run of spaces or tabs.
    decimal : {".", ","}
        Decimal mark.
    thousands : {"", ",", "."}
        Thousands separator ("" for none); the one that is not the decimal mark.
    encoding : str
        One of :data:`ENCODINGS`. UTF-16 files carry a byte-order mark.
    newline : {"\\n", "\\r\\n", "\\r"}
    x_unit : str
        Abscissa unit, one of :data:`X_UNITS`.
    y_kind : str
        Ordinate, one of :data:`Y_KINDS`.
    columns : tuple of str or None
        Column names on the header line; ``()`` for a file without one. When
        writing, ``None`` writes names made from the units, e.g.
        ``("Wavelength (nm)", "T (%)")``.
    metadata_style : str
        One of :data:`METADATA_STYLES`.
    x_order : {"ascending", "descending", "unsorted"}
        Order of the abscissa column as stored in the file.
    header_lines : int
        Lines before the first data row.
    n_columns : int
        Columns in the data rows.
    x_column, y_column : int
        0-based columns read as abscissa and ordinate.
    x_unit_from, y_kind_from : str
        Where the unit and kind came from: "header" (column name), "metadata",
        "values" (inferred from the numbers) or "option" (given by the user).
    n_rows : int
        Data rows read (before dropping rows without a number).
    text_columns : tuple of int
        0-based columns that hold words (e.g. a detector name, "PMT" / "InGaAs"); they
        are never read as wavelength or values.
    """

    delimiter: str = "\t"
    decimal: str = "."
    thousands: str = ""
    encoding: str = "utf-8"
    newline: str = "\n"
    x_unit: str = "nm"
    y_kind: str = "T_percent"
    columns: tuple | None = None
    metadata_style: str = "colon"
    x_order: str = "ascending"
    header_lines: int = 0
    n_columns: int = 2
    x_column: int = 0
    y_column: int = 1
    x_unit_from: str = ""
    y_kind_from: str = ""
    n_rows: int = 0
    text_columns: tuple = ()

    def __post_init__(self):
        def check(name, allowed):
            value = getattr(self, name)
            if value not in allowed:
                raise ParameterError(f"dialect.{name}", value, f"must be one of {allowed}")
        check("delimiter", DELIMITERS)
        check("decimal", DECIMALS)
        check("thousands", ("", ",", "."))
        check("encoding", ENCODINGS)
        check("newline", NEWLINES)
        check("x_unit", X_UNITS)
        check("y_kind", Y_KINDS)
        check("metadata_style", METADATA_STYLES)
        check("x_order", X_ORDERS)
        # Decimal comma and comma separator together: every number quoted ("500,5").
        if self.decimal == self.delimiter and self.delimiter != ",":
            raise ParameterError("dialect.decimal", self.decimal,
                                 "cannot also be the column delimiter")
        if self.thousands == self.decimal:
            raise ParameterError("dialect.thousands", self.thousands,
                                 "cannot also be the decimal mark")
        if self.columns is not None:
            object.__setattr__(self, "columns", tuple(str(c) for c in self.columns))
        object.__setattr__(self, "text_columns", tuple(int(c) for c in self.text_columns))

    def to_dict(self) -> dict:
        """Plain, JSON-ready dict of all fields."""
        d = asdict(self)
        d["columns"] = None if self.columns is None else list(self.columns)
        d["text_columns"] = list(self.text_columns)
        return d

    def describe(self) -> str:
        """One sentence a technician can check, e.g. in an import preview.

        Columns are counted from 1 here, as people count them.
        """
        def column(i):
            name = self.columns[i] if self.columns and i < len(self.columns) else ""
            return f"column {i + 1}" + (f" '{name}'" if name else "")

        decimal = "comma" if self.decimal == "," else "point"
        if self.decimal == self.delimiter:
            decimal += " (numbers in quotes)"
        thou = f", thousands separator {self.thousands!r}" if self.thousands else ""
        text = "".join(f"; {column(c)} holds text and is not read" for c in self.text_columns)
        return (f"columns separated by {_DELIMITER_NAMES[self.delimiter]}, decimal {decimal}"
                f"{thou}, {self.encoding}; wavelength from {column(self.x_column)} in "
                f"{_UNIT_NAMES[self.x_unit]} ({_FROM_NAMES.get(self.x_unit_from, 'given')}); "
                f"values from {column(self.y_column)} as {_KIND_NAMES[self.y_kind]} "
                f"({_FROM_NAMES.get(self.y_kind_from, 'given')}){text}; data from line "
                f"{self.header_lines + 1}, {self.n_rows} rows")


_UNIT_NAMES = {"nm": "nm", "um": "µm", "A": "Å", "cm-1": "cm⁻¹ (wavenumber)",
               "eV": "eV (photon energy)"}
_KIND_NAMES = {"T_fraction": "transmittance (fraction)", "T_percent": "transmittance in %",
               "absorbance": "absorbance", "R_fraction": "reflectance (fraction)",
               "R_percent": "reflectance in %", "counts": "raw detector counts"}
_FROM_NAMES = {"header": "from the column name", "metadata": "from the file header",
               "values": "guessed from the values", "option": "as set"}


@dataclass(frozen=True)
class Preview:
    """The first lines of a file and what the reader makes of them.

    ``dialect`` is None when the file cannot be read as it stands; ``problem``
    then says why, so an import dialog can show the lines next to the message
    and let the user set :class:`ReaderOptions`.
    """

    path: str
    lines: tuple
    dialect: Dialect | None
    problem: str = ""
    notes: tuple = ()           # what the reader skipped or chose, as Spectrum.warnings


# --------------------------------------------------------------------------- options

_Y_KIND_ALIASES = {"auto": "auto", "t": "T_fraction", "t_fraction": "T_fraction",
                   "t_percent": "T_percent", "%t": "T_percent", "absorbance": "absorbance",
                   "a": "absorbance", "r": "R_fraction", "r_fraction": "R_fraction",
                   "r_percent": "R_percent", "%r": "R_percent", "counts": "counts"}


@dataclass(frozen=True)
class ReaderOptions:
    """Everything the reader would otherwise detect, plus range, mask and noise.

    Every field defaults to automatic detection; recipes save the options with
    :meth:`to_dict` and load them with :meth:`from_dict`.

    Parameters
    ----------
    x_column, y_column : int, str or None
        Abscissa and ordinate column, by 0-based index or by header name
        (case-insensitive); None detects them.
    x_unit : str
        "auto" or one of :data:`X_UNITS` (aliases such as "µm", "Å", "1/cm" are
        accepted and stored in canonical form).
    y_kind : str
        "auto" or one of :data:`Y_KINDS`.
    delimiter : str
        "auto" or one of :data:`DELIMITERS` (or "tab", "semicolon", "comma",
        "whitespace").
    decimal : str
        "auto", "." or ",". A comma as both decimal mark and delimiter is read
        only with quoted numbers (``"500,5","81,25"``), as spreadsheets write them.
    encoding : str
        "auto" or one of :data:`ENCODINGS`.
    range_nm : (float, float) or None
        Keep only ``lo <= wavelength <= hi`` (nm).
    mask_windows_nm : tuple of (float, float)
        Wavelength windows (nm) excluded from fits, e.g. a detector change-over.
    sigma : None, "estimate" or float
        Noise of each point: none, estimated with
        :func:`~fitting.reference.estimate_noise`, or one value for all points
        as a fraction (0.002 = 0.2 %T).
    name : str
        Display name; defaults to the file stem.
    """

    x_column: int | str | None = None
    y_column: int | str | None = None
    x_unit: str = "auto"
    y_kind: str = "auto"
    delimiter: str = "auto"
    decimal: str = "auto"
    encoding: str = "auto"
    range_nm: tuple | None = None
    mask_windows_nm: tuple = ()
    sigma: float | str | None = None
    name: str = ""

    def __post_init__(self):
        set_ = lambda k, v: object.__setattr__(self, k, v)  # noqa: E731
        for key in ("x_column", "y_column"):
            v = getattr(self, key)
            if isinstance(v, bool) or not (v is None or isinstance(v, (int, str))):
                raise RecipeError(key, f"must be a column index, a column name or None, "
                                       f"got {v!r}")
            if isinstance(v, int) and v < 0:
                raise RecipeError(key, f"column index must be 0 or more, got {v}")
            if isinstance(v, str) and not v.strip():
                raise RecipeError(key, "column name is empty")
        if (self.x_column is not None and self.x_column == self.y_column):
            raise RecipeError("y_column", f"is the same column as x_column ({self.x_column!r})")
        if not isinstance(self.x_unit, str):
            raise RecipeError("x_unit", f"must be a string, got {self.x_unit!r}")
        if self.x_unit != "auto":
            unit = self.x_unit if self.x_unit in X_UNITS else _unit_word(self.x_unit)
            if unit is None:
                raise RecipeError("x_unit", f"unknown unit {self.x_unit!r}; use 'auto' or one "
                                            f"of {X_UNITS}")
            set_("x_unit", unit)
        kind = self.y_kind if self.y_kind in Y_KINDS else \
            _Y_KIND_ALIASES.get(str(self.y_kind).lower())
        if kind is None:
            raise RecipeError("y_kind", f"unknown ordinate {self.y_kind!r}; use 'auto' or one "
                                        f"of {Y_KINDS}")
        set_("y_kind", kind)
        delim = _DELIMITER_ALIASES.get(self.delimiter, self.delimiter) \
            if isinstance(self.delimiter, str) else self.delimiter
        if delim != "auto" and delim not in DELIMITERS:
            raise RecipeError("delimiter", f"must be 'auto', 'tab', ';', ',' or 'whitespace', "
                                           f"got {self.delimiter!r}")
        set_("delimiter", delim)
        if self.decimal not in ("auto", *DECIMALS):
            raise RecipeError("decimal", f"must be 'auto', '.' or ',', got {self.decimal!r}")
        if self.decimal != "auto" and self.decimal == self.delimiter != ",":
            raise RecipeError("decimal", f"{self.decimal!r} cannot be both decimal mark and "
                                         f"delimiter")
        if self.encoding != "auto":
            enc = _ENCODING_ALIASES.get(str(self.encoding).lower())
            if enc is None:
                raise RecipeError("encoding", f"unsupported encoding {self.encoding!r}; use "
                                              f"'auto' or one of {ENCODINGS}")
            set_("encoding", enc)
        if self.range_nm is not None:
            set_("range_nm", _window("range_nm", self.range_nm))
        try:
            windows = tuple(_window("mask_windows_nm", w) for w in self.mask_windows_nm)
        except TypeError:
            raise RecipeError("mask_windows_nm", f"must be a list of (start, stop) pairs in "
                                                 f"nm, got {self.mask_windows_nm!r}") from None
        set_("mask_windows_nm", windows)
        s = self.sigma
        if s is not None and s != "estimate":
            if isinstance(s, bool) or not isinstance(s, (int, float)) \
                    or not math.isfinite(s) or s <= 0:
                raise RecipeError("sigma", f"must be None, 'estimate' or a positive number "
                                           f"(fraction, 0.002 = 0.2 %), got {s!r}")
            set_("sigma", float(s))
        if not isinstance(self.name, str):
            raise RecipeError("name", f"must be a string, got {self.name!r}")

    def to_dict(self) -> dict:
        """JSON-ready dict (tuples become lists)."""
        d = asdict(self)
        d["range_nm"] = None if self.range_nm is None else list(self.range_nm)
        d["mask_windows_nm"] = [list(w) for w in self.mask_windows_nm]
        return d

    @classmethod
    def from_dict(cls, data: dict) -> ReaderOptions:
        """Options from :meth:`to_dict` output; unknown keys are refused.

        Raises
        ------
        RecipeError
            Naming the first unknown key or invalid value.
        """
        if not isinstance(data, dict):
            raise RecipeError("reader", f"must be a JSON object, got {type(data).__name__}")
        known = {f.name for f in fields(cls)}
        for key in data:
            if key not in known:
                raise RecipeError(key, f"unknown reader option; known options are "
                                       f"{', '.join(sorted(known))}")
        kw = dict(data)
        if isinstance(kw.get("range_nm"), list):
            kw["range_nm"] = tuple(kw["range_nm"])
        if isinstance(kw.get("mask_windows_nm"), list):
            kw["mask_windows_nm"] = tuple(tuple(w) if isinstance(w, list) else w
                                          for w in kw["mask_windows_nm"])
        return cls(**kw)


def _window(field_name: str, pair) -> tuple[float, float]:
    try:
        lo, hi = pair
        lo, hi = float(lo), float(hi)
    except (TypeError, ValueError):
        raise RecipeError(field_name, f"must be a (start, stop) pair in nm, got {pair!r}") \
            from None
    if not (math.isfinite(lo) and math.isfinite(hi)) or lo >= hi:
        raise RecipeError(field_name, f"start must be below stop and both finite, got {pair!r}")
    return lo, hi


# --------------------------------------------------------------------------- decoding

_CONTROL = re.compile(r"[\x00-\x08\x0e-\x1f\x7f]")


def _fail(path, line, reason, expected="", found=""):
    return SpectrumFormatError(path, line, reason, expected=expected, found=found)


#: Magic numbers of files technicians mistake for spectrum tables, with what to do.
_SIGNATURES = (
    (b"PK\x03\x04", "a ZIP archive, e.g. an Excel workbook (.xlsx)",
     "open it in the spreadsheet program and save the sheet as CSV"),
    (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1", "an old Office file, e.g. an Excel workbook (.xls)",
     "open it in the spreadsheet program and save the sheet as CSV"),
    (b"%PDF", "a PDF document", "export the spectrum as a text table (CSV or TXT) instead"),
    (b"\x89PNG", "a PNG image", "export the spectrum as a text table (CSV or TXT) instead"),
    (b"\xff\xd8\xff", "a JPEG image", "export the spectrum as a text table (CSV or TXT) "
     "instead"),
    (b"\x1f\x8b", "a gzip-compressed file", "unpack it first"),
)
_EXPORT_AS_TEXT = ("export the spectrum from the instrument software as a text table "
                   "(CSV or TXT)")


def _decode(raw: bytes, encoding: str, path) -> tuple[str, str]:
    """Bytes to text with normalised newlines, and the encoding's name."""
    if not raw.strip():
        raise _fail(path, 1, "the file is empty (no text at all); check that the export "
                    "from the instrument finished, then export the spectrum again",
                    expected="a table of wavelength and T or R values")
    for magic, what, todo in _SIGNATURES:
        if raw.startswith(magic):
            raise _fail(path, None, f"this is {what}, not a text table; {todo}",
                        expected="a text table of wavelength and T or R values")
    boms = {"utf-8-sig": codecs.BOM_UTF8, "utf-8": codecs.BOM_UTF8,
            "utf-16-le": codecs.BOM_UTF16_LE, "utf-16-be": codecs.BOM_UTF16_BE,
            "utf-32-le": codecs.BOM_UTF32_LE, "utf-32-be": codecs.BOM_UTF32_BE}
    if encoding != "auto":
        used = encoding
    elif raw.startswith(codecs.BOM_UTF8):
        used = "utf-8-sig"
    # UTF-32-LE before UTF-16-LE: its mark FF FE 00 00 starts with UTF-16-LE's FF FE.
    elif raw.startswith(codecs.BOM_UTF32_LE):
        used = "utf-32-le"
    elif raw.startswith(codecs.BOM_UTF32_BE):
        used = "utf-32-be"
    elif raw.startswith(codecs.BOM_UTF16_LE):
        used = "utf-16-le"
    elif raw.startswith(codecs.BOM_UTF16_BE):
        used = "utf-16-be"
    elif b"\x00" in raw[:4096]:
        used = _utf16_without_bom(raw[:4096])
        if used is None:
            at = raw.index(b"\x00")
            raise _fail(path, None, "this is a binary file (perhaps the instrument's own "
                        f"format), not a text table; {_EXPORT_AS_TEXT}",
                        expected="text", found=f"byte 0x00 at byte {at}")
    else:
        used = "utf-8"
    skip = len(boms[used]) if used in boms and raw.startswith(boms[used]) else 0
    body = raw[skip:]
    codec = "utf-8" if used == "utf-8-sig" else used
    try:
        try:
            text = body.decode(codec)
        except UnicodeDecodeError:
            if encoding != "auto" or used != "utf-8":
                raise
            # Windows exports: cp1252 is Latin-1 with printable 0x80-0x9F.
            used = "cp1252" if re.search(rb"[\x80-\x9f]", body) else "latin-1"
            try:
                text = body.decode(used)
            except UnicodeDecodeError:
                used, text = "latin-1", body.decode("latin-1")
    except UnicodeDecodeError as exc:
        newline = {"utf-16-le": b"\n\x00", "utf-16-be": b"\x00\n",
                   "utf-32-le": b"\n\x00\x00\x00", "utf-32-be": b"\x00\x00\x00\n"
                   }.get(used, b"\n")
        line = body[:exc.start].count(newline) + 1
        raise _fail(path, line, f"the file cannot be read as {used} text; set the reader's "
                    "encoding to the one the file was saved in (or 'auto')",
                    expected=f"{used} text", found=repr(body[exc.start:exc.start + 4])) from None
    if text.startswith("\ufeff"):
        text = text[1:]
    text = text.replace("\r\n", "\n").replace("\r", "\n").rstrip("\x1a")  # DOS end-of-file
    bad = _CONTROL.search(text)
    if bad:
        line = text.count("\n", 0, bad.start()) + 1
        raise _fail(path, line, "this is a binary or damaged file, or text in an encoding "
                    f"Pellucid does not know, not a text table; {_EXPORT_AS_TEXT} in UTF-8, "
                    "UTF-16 or Latin-1", expected="printable text",
                    found=f"control character U+{ord(bad.group()):04X}")
    return text, used


def _utf16_without_bom(head: bytes) -> str | None:
    """UTF-16 byte order from where the NUL bytes of ASCII text sit, or None (binary)."""
    even, odd = head[0::2], head[1::2]
    if odd and odd.count(0) > 0.3 * len(odd) and even.count(0) < 0.05 * len(even):
        return "utf-16-le"
    if even and even.count(0) > 0.3 * len(even) and odd.count(0) < 0.05 * len(odd):
        return "utf-16-be"
    return None


def _newline_of(raw: bytes, encoding: str) -> str:
    head = raw[:8192]
    if encoding.startswith(("utf-16", "utf-32")):
        head = head.replace(b"\x00", b"")
    if b"\r\n" in head:
        return "\r\n"
    if b"\r" in head:
        return "\r"
    return "\n"


# --------------------------------------------------------------------------- tokens

_MISSING = frozenset({"", "nan", "+nan", "-nan", "na", "n/a", "n.a.", "-", "--", "---", "----",
                      "null", "none", "?", "*", "#n/a", "#value!", "#div/0!", "#num!"})
_INF = {"inf": math.inf, "+inf": math.inf, "-inf": -math.inf, "infinity": math.inf,
        "+infinity": math.inf, "-infinity": -math.inf}
_COMMENT = re.compile(r"(#|//|!|%(?=\s|%|$))")


class _Numbers:
    """Strict number syntax of one decimal mark, with optional thousands groups."""

    def __init__(self, decimal: str):
        d = re.escape(decimal)
        t = re.escape("," if decimal == "." else ".")
        self.decimal = decimal
        self.thousands = "," if decimal == "." else "."
        self.plain = re.compile(rf"[+-]?(?:\d+(?:{d}\d*)?|{d}\d+)(?:[eE][+-]?\d+)?\Z", re.ASCII)
        self.grouped = re.compile(rf"[+-]?[1-9]\d{{0,2}}(?:{t}\d{{3}})+(?:{d}\d*)?\Z", re.ASCII)
        self.seen_thousands = False
        self._rows: dict = {}
        #: Indices of the head lines found to be plain rows (:meth:`plain_row`) under
        #: the one delimiter this instance judged them with (the dialect search).
        self.plain_lines: set = set()

    def row_pattern(self, delimiter: str):
        """The regular expression of a plain row (see :meth:`plain_row`) under
        ``delimiter``, or False where rows must be judged field by field."""
        row = self._rows.get(delimiter)
        if row is None:
            num = rf"[+-]?(?:\d+(?:{re.escape(self.decimal)}\d*)?|{re.escape(self.decimal)}\d+)" \
                  r"(?:[eE][+-]?\d+)?"
            if delimiter == self.decimal:
                row = False                  # quoted decimal commas: field by field
            elif delimiter == " ":
                row = re.compile(rf"{num}(?:[ \t]+{num})+", re.ASCII)
            else:
                sep = re.escape(delimiter)
                row = re.compile(rf"{num}(?:[ \t]*{sep}[ \t]*{num})+(?:[ \t]*{sep})*", re.ASCII)
            self._rows[delimiter] = row
        return row

    def plain_row(self, stripped: str, delimiter: str) -> int:
        """Number of fields if the stripped line is two or more plain numbers joined by
        ``delimiter`` (spaces or tabs around it), else 0: the common data row, judged
        with one regular expression instead of field by field."""
        row = self.row_pattern(delimiter)
        if not row or not row.fullmatch(stripped):
            return 0
        return _plain_fields(stripped, delimiter)

    def plain_values(self, rows: list, delimiter: str, n_fields: int) -> list | None:
        """The numbers of plain rows (each matched by :meth:`row_pattern` and holding
        ``n_fields`` fields), row after row, in one split of their joined text; None
        if some field is empty (then read them field by field).

        The same floats :meth:`parse` gives field by field: a plain field holds no
        delimiter, space or quote, so splitting the joined rows on whitespace after
        turning each delimiter into a space yields exactly the fields in order. An
        empty field (two tabs, which the pattern allows around a tab) makes fewer
        numbers than fields, never more, so the count tells.
        """
        text = "\n".join(rows)
        if delimiter != " ":
            text = text.replace(delimiter, " ")
        if self.decimal == ",":
            text = text.replace(",", ".")
        values = list(map(float, text.split()))
        if len(values) != len(rows) * n_fields:
            # Tab tables only: the pattern lets tabs surround a tab, so "450\t\t87"
            # is plain but has an empty field, which the split above cannot see.
            return None
        return values

    def parse(self, token: str) -> float | None:
        """float; NaN for a missing-value marker; None for text."""
        tok = token.strip().strip('"').strip()
        if tok[:1].isalpha():            # a word, unless it spells a missing value or inf
            low = tok.lower()
            return math.nan if low in _MISSING else _INF.get(low)
        if self.plain.match(tok):
            return float(tok.replace(",", ".") if self.decimal == "," else tok)
        low = tok.lower()
        if low in _MISSING:
            return math.nan
        if low in _INF:
            return _INF[low]
        if self.grouped.match(tok):
            self.seen_thousands = True
            tok = tok.replace(self.thousands, "")
            return float(tok.replace(",", ".") if self.decimal == "," else tok)
        return None


def _plain_fields(stripped: str, delimiter: str) -> int:
    """Number of fields of a plain row (one :meth:`_Numbers.row_pattern` matched)."""
    if delimiter == " ":
        return len(stripped.split())
    return stripped.rstrip(" \t" + delimiter).count(delimiter) + 1


def _split(line: str, delimiter: str) -> list[str]:
    if delimiter == " ":
        parts = line.split()
    elif '"' in line:
        try:
            parts = next(csv.reader([line], delimiter=delimiter, quotechar='"',
                                    skipinitialspace=True))
        except (csv.Error, StopIteration):
            parts = line.split(delimiter)
    else:
        parts = line.split(delimiter)
    parts = [p.strip() for p in parts]
    while parts and parts[-1] == "":         # "450;87;" has two columns
        parts.pop()
    return parts


def _is_comment(stripped: str) -> bool:
    return bool(_COMMENT.match(stripped))


# Row kinds while sniffing. _BROKEN: starts with a number but holds text, i.e. a
# damaged data row (it belongs to the data block and is reported when parsed).
# _MIXED: two or more numbers beside words, a row of a table with a text column
# ("400;87.2;PMT"). _WIDE: more than _MAX_COLUMNS fields.
_BLANK, _COMMENT_ROW, _DATA, _GAP, _SINGLE, _TEXT, _BROKEN, _MIXED, _WIDE = range(9)
_NUMERIC_ROWS = (_DATA, _MIXED)
_HAS_DIGIT = re.compile(r"\d")
_HAS_SPACE = re.compile(r"\s")
#: Word cells a row of a table with text columns may hold; more is a line of text.
_MAX_WORDS = 4


def _is_missing(v) -> bool:
    return v is not None and v != v


def _is_word(token: str) -> bool:
    """A text cell ("PMT", "InGaAs"), as opposed to a damaged number ("5O", "1.2.3")."""
    return token.strip().strip('"')[:1].isalpha()


def _row_kind(line: str, delimiter: str, numbers: _Numbers) -> tuple[int, int]:
    """(kind, number of fields) of one line under a candidate dialect."""
    s = line.strip()
    if len(s) <= _MAX_LINE:
        n = numbers.plain_row(s, delimiter)
        if n:
            return (_WIDE if n > _MAX_COLUMNS else _DATA), n
    return _row_kind_exact(line, delimiter, numbers)


def _row_kind_exact(line: str, delimiter: str, numbers: _Numbers) -> tuple[int, int]:
    """:func:`_row_kind` field by field (every kind of line)."""
    s = line.strip()
    if not s:
        return _BLANK, 0
    if _is_comment(s):
        return _COMMENT_ROW, 0
    if len(s) > _MAX_LINE:
        return _TEXT, 0
    toks = _split(s, delimiter)
    if not _HAS_DIGIT.search(s):         # words, or a row of missing values ("--;--")
        missing = all(_is_missing(numbers.parse(t)) for t in toks)
        return (_GAP if missing else _TEXT), len(toks)
    if len(toks) > _MAX_COLUMNS:
        return _WIDE, len(toks)
    n_num = n_words = 0
    for tok in toks:
        v = numbers.parse(tok)
        if v is None:
            if _is_word(tok):
                n_words += 1
                if n_words > _MAX_WORDS:
                    return _TEXT, len(toks)
                continue
            if len(toks) > 1 and numbers.parse(toks[0]) is not None:
                return _BROKEN, len(toks)
            return _TEXT, len(toks)
        if v == v:
            n_num += 1
    if n_words:
        if n_num >= 2:
            return _MIXED, len(toks)
        if numbers.parse(toks[0]) is not None and n_num:
            return _BROKEN, len(toks)
        return _TEXT, len(toks)
    if n_num >= 2:
        return _DATA, len(toks)
    if n_num == 1 and len(toks) == 1:
        return _SINGLE, 1
    return _GAP, len(toks)


_ROWLIKE = (_DATA, _GAP, _BROKEN, _MIXED, _WIDE)


def _header_like(line: str, delimiter: str, header: str | None = None) -> bool:
    """Column names ("Wavelength (nm);T (%)"): the detected header line, or an abscissa
    name followed by an ordinate name."""
    s = line.strip()
    if header is not None and s == header.strip():
        return True
    toks = _split(s, delimiter)
    return (len(toks) >= 2 and _abscissa_label(toks[0].strip('"'))[0]
            and _ordinate_label(toks[1].strip('"')) is not None)


# --------------------------------------------------------------------------- sniffing

@dataclass
class _Layout:
    """What sniffing the head of a file found (internal)."""

    delimiter: str
    decimal: str
    start: int                  # index of the first data line
    names: tuple                # column names ("" where unnamed), () without header
    n_columns: int
    sample: np.ndarray          # first data rows, shape (rows, n_columns), NaN = not a number
    metadata: dict
    comments: list
    metadata_style: str
    header_line: int | None     # 1-based line of the column names
    text_columns: tuple = ()    # 0-based columns holding words ("PMT"), never read
    text_examples: dict = None  # column -> a few of its distinct words, for the notes
    notes: list = None          # what sniffing noticed (data-like lines before the table)
    header_text: str | None = None  # the line of column names as written


def _head_lines(text: str, n: int, max_chars: int = _MAX_HEAD_CHARS) -> tuple[list[str], bool]:
    """The first ``n`` lines (at most about ``max_chars`` characters) and whether they
    are all the text holds."""
    if len(text) < max_chars:
        # The same lines in one split: no line can start past the character limit.
        lines = text.split("\n", n)
        if len(lines) <= n:
            return lines, True
        return lines[:n], not lines[n]
    return _head_lines_by_line(text, n, max_chars)


def _head_lines_by_line(text: str, n: int, max_chars) -> tuple[list[str], bool]:
    """:func:`_head_lines` one line at a time, stopping at ``max_chars`` (the general case)."""
    lines, pos = [], 0
    while len(lines) < n and pos < max_chars:
        end = text.find("\n", pos)
        if end < 0:
            lines.append(text[pos:])
            return lines, True
        lines.append(text[pos:end])
        pos = end + 1
    return lines, pos >= len(text)


def _choose_dialect(lines, options, path, evidence: dict | None = None):
    """The (delimiter, decimal mark, row kinds, number syntax) of the head ``lines``, or None.

    The same choice as :func:`_choose_dialect_full`, found by
    :func:`_choose_dialect_bounded` with far fewer lines parsed; the full search runs
    only when no candidate finds a numeric row, to collect the ``evidence`` the
    refusal quotes (see there), reusing the rows the bounded search judged already.
    """
    seen: dict = {}
    choice = _choose_dialect_bounded(lines, options, seen)
    if choice is None:
        choice = _choose_dialect_full(lines, options, evidence, seen)
    return choice


def _candidates(options, quoted: bool) -> list:
    """(delimiter priority, decimal index, delimiter, decimal) in the order the full
    search scores them."""
    delims = DELIMITERS if options.delimiter == "auto" else (options.delimiter,)
    decs = DECIMALS if options.decimal == "auto" else (options.decimal,)
    # Decimal comma and comma separator only together with quoted fields
    # ("500,5","81,25"), as spreadsheets write them.
    return [(pri, j, delim, dec) for pri, delim in enumerate(delims)
            for j, dec in enumerate(decs) if dec != delim or (delim == "," and quoted)]


#: Last lines of the head each candidate reads first: the one reading most of them as rows
#: (on a tie, the full search's first) is scored first.
_PROBE_LINES = 4


_ROW_OR_WIDE = frozenset((*_NUMERIC_ROWS, _WIDE))


def _judge_rows(maybe, kinds, stripped, lines, delim, numbers) -> None:
    """Fill ``kinds`` for the lines ``maybe`` not judged yet: :func:`_row_kind`, with
    the plain-row test run over all lines in one pass (C-level ``map``); each plain
    line's index goes into ``numbers.plain_lines``. ``stripped`` holds the stripped
    lines, all short and holding a digit here."""
    todo = [i for i in maybe if i not in kinds]
    if not todo:
        return
    row = numbers.row_pattern(delim)
    texts = [stripped[i] for i in todo]
    matched = list(map(row.fullmatch, texts)) if row else [None] * len(todo)
    plain = numbers.plain_lines
    if row and None not in matched:
        # The common head, all plain rows below a header.
        counts = [_plain_fields(s, delim) for s in texts]
        kinds.update(zip(todo, [(_DATA, n) if n <= _MAX_COLUMNS else (_WIDE, n)
                                for n in counts]))
        plain.update(todo)
        return
    for i, s, m in zip(todo, texts, matched):
        if m is None:
            kinds[i] = _row_kind_exact(lines[i], delim, numbers)
        else:
            n = _plain_fields(s, delim)
            kinds[i] = (_WIDE if n > _MAX_COLUMNS else _DATA), n
            plain.add(i)


def _beats(maybe, kinds, lines, delim, numbers, tie, best_key) -> bool:
    """Whether a candidate can still reach ``best_key``: its lines judged one by one
    (into ``kinds``) until the rows it may still find cannot, False then."""
    n_data, left = 0, len(maybe)
    for i in maybe:
        left -= 1
        kind = kinds.get(i)
        if kind is None:
            kind = kinds[i] = _row_kind(lines[i], delim, numbers)
        if kind[0] in _ROW_OR_WIDE:
            n_data += 1
        elif (n_data + left, True, *tie) < best_key:
            return False
    return True


def _choose_dialect_bounded(lines, options, seen: dict | None = None):
    """:func:`_choose_dialect_full`'s choice, found by branch and bound.

    The full search keeps the candidate with the largest key (numeric rows, decimal
    mark agreeing with the commas, delimiter priority), the first one on a tie, i.e.
    the largest (n_rows, agrees, -priority, -decimal index). A line can be a numeric
    row under a candidate only if it holds a digit and, stripped, the delimiter
    (for spaces: whitespace between two fields); :func:`_row_kind` decides nothing
    else without those. So a candidate's count of such lines bounds its key from
    above, and a candidate is dropped as soon as that bound, lowered by each line it
    fails to read as a row, falls below the best key found so far. The likely
    candidate (ranked on a probe of a few lines) is scored first, so the others
    usually drop after a line or two and only the winner parses every line. The order
    decides only how soon the others drop, never which candidate wins.

    Returns None if no candidate finds a numeric row (the caller then runs the full
    search for the evidence of its refusal). ``seen``, if given, receives the row
    kinds judged, per (delimiter, decimal mark), for that search to reuse.
    """
    stripped = [line.strip() for line in lines]
    # The pattern tests run by C-level map: this judges every line of the head.
    rowlike = [i for i, (s, d, c) in enumerate(zip(stripped, map(_HAS_DIGIT.search, stripped),
                                                   map(_COMMENT.match, stripped)))
               if d and not c and len(s) <= _MAX_LINE]
    quoted = any('"' in line for line in lines)
    found: dict = {}
    cands = []
    for pri, j, delim, dec in _candidates(options, quoted):
        if delim not in found:
            # A stripped line splits on whitespace iff it holds any (re's \s is
            # str.isspace, the set str.split uses).
            texts = [stripped[i] for i in rowlike]
            found[delim] = ([i for i, m in zip(rowlike, map(_HAS_SPACE.search, texts)) if m]
                            if delim == " " else [i for i, t in zip(rowlike, texts)
                                                  if delim in t])
        maybe = found[delim]
        if not maybe:
            continue
        numbers = _Numbers(dec)
        probe = {i: _row_kind(lines[i], delim, numbers) for i in maybe[-_PROBE_LINES:]}
        if seen is not None:
            seen[delim, dec] = probe
        hits = sum(1 for k, _ in probe.values() if k in _NUMERIC_ROWS or k == _WIDE)
        cands.append((-hits, pri, j, delim, dec, numbers, maybe, probe))
    cands.sort(key=lambda c: c[:3])
    best, best_key = None, None
    for _, pri, j, delim, dec, numbers, maybe, kinds in cands:
        if best_key is not None and (len(maybe), True, -pri, -j) < best_key:
            continue
        if best_key is None:
            # Nothing to beat yet: every line is judged, all at once.
            _judge_rows(maybe, kinds, stripped, lines, delim, numbers)
        elif not _beats(maybe, kinds, lines, delim, numbers, (-pri, -j), best_key):
            continue
        n_data = sum(1 for i in maybe if kinds[i][0] in _ROW_OR_WIDE)
        if n_data == 0:
            continue
        if delim == "," and not quoted:
            commas = False                   # _comma_in_number needs quotes for ","
        else:
            commas = any(_comma_in_number(lines[i], delim)
                         for i in maybe if kinds[i][0] in _NUMERIC_ROWS)
        key = (n_data, (dec == ",") == commas, -pri, -j)
        if best_key is None or key > best_key:
            best, best_key = (delim, dec, kinds, numbers), key
    if best is None:
        return None
    delim, dec, kinds, numbers = best
    return delim, dec, [kinds.get(i) or _row_kind(line, delim, numbers)
                        for i, line in enumerate(lines)], numbers


def _choose_dialect_full(lines, options, evidence: dict | None = None,
                         seen: dict | None = None):
    """Score each (delimiter, decimal) by how many lines parse as numeric rows: the
    reference search, every candidate over every line.

    ``evidence``, if given, receives what a refusal needs without another pass over
    the lines: "broken", the damaged rows of the candidate with most of them, and
    "single", per decimal mark, the lines holding one number (whitespace candidates).
    ``seen``: row kinds judged before, per (delimiter, decimal mark) and line index.
    """
    seen = seen or {}
    delims = DELIMITERS if options.delimiter == "auto" else (options.delimiter,)
    decs = DECIMALS if options.decimal == "auto" else (options.decimal,)
    quoted = any('"' in line for line in lines)
    best, best_key = None, None
    for pri, delim in enumerate(delims):
        for dec in decs:
            # Decimal comma and comma separator only together with quoted fields
            # ("500,5","81,25"), as spreadsheets write them.
            if dec == delim and not (delim == "," and quoted):
                continue
            numbers = _Numbers(dec)
            known = seen.get((delim, dec), {})
            kinds = [known.get(i) or _row_kind(line, delim, numbers)
                     for i, line in enumerate(lines)]
            if evidence is not None:
                broken = [i for i, (k, _) in enumerate(kinds) if k == _BROKEN]
                if broken and len(broken) > len(evidence.get("broken", ((),))[0]):
                    evidence["broken"] = (broken, delim, numbers)
                if delim == " ":
                    evidence.setdefault("single", {})[dec] = [
                        i for i, (k, _) in enumerate(kinds) if k == _SINGLE]
            n_data = sum(1 for k, _ in kinds if k in _NUMERIC_ROWS or k == _WIDE)
            if n_data == 0:
                continue
            # A comma inside numbers argues for the decimal comma, its absence for
            # the point; the explicit separators outrank "any whitespace".
            commas = any(_comma_in_number(line, delim)
                         for line, (k, _) in zip(lines, kinds) if k in _NUMERIC_ROWS)
            key = (n_data, (dec == ",") == commas, -pri)
            if best_key is None or key > best_key:
                best, best_key = (delim, dec, kinds, numbers), key
    return best


def _comma_in_number(line: str, delim: str) -> bool:
    if delim != ",":
        return "," in line
    return '"' in line and any("," in tok for tok in _split(line.strip(), delim))


#: "100 ms", "2.5 nm": a metadata value with a unit, never a column name.
_QUANTITY_VALUE = re.compile(r"[+-]?\d+(?:[.,]\d+)?\s*[^\W\d_]", re.ASCII)
_KV = re.compile(r"\s*([^\W\d][^:=]{0,80}?)\s*([:=])(.*)\Z", re.S)


def _key_value(s: str):
    if len(s) > 4096:
        return None
    m = _KV.match(s)
    if not m:
        return None
    return m.group(1).strip(), m.group(3).strip(), ("colon" if m.group(2) == ":" else "equals")


def _layout(text: str, options: ReaderOptions, path,
            min_rows: int = MIN_POINTS) -> _Layout:
    """Dialect, start of the data, columns and preamble, from a bounded head of the text.

    The head grows from 400 lines (x8) only while no table has been found, and never
    beyond :data:`_MAX_HEAD_LINES` lines or :data:`_MAX_HEAD_CHARS` characters: a file
    with no table there is refused without reading the rest.
    """
    n = _SNIFF_LINES
    while True:
        lines, complete = _head_lines(text, n)
        evidence: dict = {}
        choice = _choose_dialect(lines, options, path, evidence)
        start = None
        if choice is not None:
            delim, dec, kinds, numbers = choice
            start = _first_run(lines, kinds, complete, delim, min_rows)
        if start is not None or complete or n >= _MAX_HEAD_LINES \
                or len(lines) < n:           # stopped by the character limit
            break
        n *= 8
    first_content = next((i for i, line in enumerate(lines) if line.strip()), 0)
    if choice is None:
        if options.delimiter == options.decimal == "," and \
                not any('"' in line for line in lines):
            raise _fail(path, first_content + 1, "the reader is set to decimal comma and "
                        "comma separator, which only works with quoted numbers "
                        "(\"500,5\",\"81,25\"), and this file has no quotes; set the "
                        "delimiter or the decimal mark to 'auto'",
                        expected="quoted numbers", found=lines[first_content].strip()[:80])
        single = _find_single(lines, options, evidence)
        if single is not None:
            raise _one_column(path, single + 1, lines[single])
        broken = _first_broken(lines, evidence)
        if broken is not None and not _garbled(lines):
            at, token = broken
            raise _fail(path, at + 1, "rows of numbers were found, but their numbers hold "
                        "characters that are no digits or decimal mark; export again with "
                        "'.' or ',' as decimal mark, or correct the file",
                        expected="numbers like 450.5 or 450,5", found=token[:40])
        if _garbled(lines):
            raise _fail(path, first_content + 1, "the text is unreadable: the file is saved "
                        "in a character encoding Pellucid does not know (it reads UTF-8, "
                        "UTF-16, UTF-32, Latin-1 and Windows-1252); save or export it again "
                        "as UTF-8 text, or set the reader's encoding",
                        expected="readable text")
        raise _fail(path, first_content + 1, "no rows of two or more numbers were found"
                    + _head_note(lines, complete) + "; check that this is a spectrum table "
                    "with a wavelength column and a T or R column",
                    expected="rows like '450.5<tab>87.2' or '450,5;87,2'",
                    found=lines[first_content].strip()[:80])
    if start is None and not complete:
        raise _fail(path, first_content + 1, "no table of numbers was found"
                    + _head_note(lines, complete) + "; this does not look like a spectrum "
                    "export: check that this is a spectrum table with a wavelength column "
                    "and a T or R column", expected="a table of at least "
                    f"{min_rows} rows like '450.5<tab>87.2'",
                    found=lines[first_content].strip()[:80])
    if options.delimiter == "auto" and options.decimal == "auto":
        single = _decimal_comma_column(lines, kinds, delim, dec)
        if single is not None:
            raise _one_column(path, single + 1, lines[single])
    if start is None:
        data_rows = [i for i, (k, _) in enumerate(kinds) if k in _NUMERIC_ROWS]
        if not data_rows:                    # only rows past the column limit
            wide = next(i for i, (k, _) in enumerate(kinds) if k == _WIDE)
            raise _too_wide(path, wide + 1, kinds[wide][1])
        if len(data_rows) >= min_rows:
            cut = next((i for i, (k, _) in enumerate(kinds)
                        if i > data_rows[0] and k in (_TEXT, _SINGLE)), data_rows[0])
            raise _fail(path, cut + 1, "a line of text interrupts the rows of numbers; delete "
                        "it or move it above the table",
                        expected="one table: only rows of numbers between the first and the "
                                 "last data row", found=lines[cut].strip()[:80])
        raise _fail(path, data_rows[0] + 1, f"only {len(data_rows)} data rows were found, at "
                    f"least {min_rows} are needed" + _head_note(lines, complete) + "; check that "
                    "the whole spectrum was exported",
                    expected=f"{min_rows} or more rows of numbers",
                    found=lines[data_rows[0]].strip()[:80])
    run = next(i for i in range(start, len(kinds)) if kinds[i][0] in (_DATA, _MIXED, _WIDE))
    if kinds[run][0] == _WIDE:
        raise _too_wide(path, run + 1, kinds[run][1])
    # Field count of the table: the commonest among its first numeric rows (the run
    # found above starts with one, so the list is never empty).
    counts = [nf for k, nf in kinds[start:] if k in _NUMERIC_ROWS][:200]
    n_columns = max(set(counts), key=counts.count)
    rows = [(i, k, nf) for i, (k, nf) in enumerate(kinds[start:], start)
            if k in (_DATA, _GAP, _MIXED)][:500]
    sample = np.full((len(rows), n_columns), np.nan)
    words = np.zeros((len(rows), n_columns), dtype=bool)
    examples: dict = {}
    # Plain rows of the table's width (nearly all) are read in one go; the others
    # field by field, which also finds the words of text columns.
    pattern, known = numbers.row_pattern(delim), numbers.plain_lines
    plain, plain_rows = [], []

    def read_row(r, line):
        for c, tok in enumerate(_split(line.strip(), delim)[:n_columns]):
            v = numbers.parse(tok)
            if v is None:
                words[r, c] = _is_word(tok)
                if words[r, c] and len(examples.setdefault(c, [])) < 3 \
                        and tok.strip('"') not in examples[c]:
                    examples[c].append(tok.strip('"')[:20])
            else:
                sample[r, c] = v

    for r, (i, k, nf) in enumerate(rows):
        if k == _DATA and nf == n_columns and pattern:
            s = lines[i].strip()
            if i in known or pattern.fullmatch(s):
                plain.append(r)
                plain_rows.append(s)
                continue
        read_row(r, lines[i])
    if plain:
        values = numbers.plain_values(plain_rows, delim, n_columns)
        if values is not None:
            sample[plain] = np.array(values, dtype=float).reshape(len(plain), n_columns)
        else:                   # a tab table with an empty field ("450\t\t87"): careful
            for r, s in zip(plain, plain_rows):
                read_row(r, s)  # plain rows hold no words: examples are not touched
    present = np.maximum((np.isfinite(sample) | words).sum(axis=0), 1)
    text_columns = tuple(int(c) for c in np.flatnonzero(words.sum(axis=0) > 0.5 * present))
    names, header_line, metadata, comments, style = _preamble(
        lines[:start], delim, numbers, n_columns)
    notes = _stray_rows_before(lines, kinds, start, n_columns)
    return _Layout(delim, dec, start, names, n_columns, sample, metadata, comments, style,
                   header_line, text_columns, {c: examples.get(c, []) for c in text_columns},
                   notes, None if header_line is None else lines[header_line - 1])


def _head_note(lines, complete: bool) -> str:
    if complete:
        return ""
    return (f" in the first {len(lines):,} lines (where a spectrum export has its table; "
            "the rest of the file was not read)")


def _too_wide(path, line: int, n_fields: int) -> SpectrumFormatError:
    return _fail(path, line, f"the table has {n_fields} columns, more than the "
                 f"{_MAX_COLUMNS} Pellucid reads; export only the wavelength column and the "
                 "spectrum's T or R column (or split the table into one file per spectrum)",
                 expected=f"at most {_MAX_COLUMNS} columns", found=f"{n_fields} columns")


def _stray_lines(lines, kinds, delim) -> set:
    """Indices of short runs (up to 3) of text lines between numeric rows: notes such as
    "Lamp change" inside the data, not the end of a header. Column names never are."""
    content = [i for i, (k, _) in enumerate(kinds) if k not in (_BLANK, _COMMENT_ROW)]
    stray: set = set()
    j = 0
    while j < len(content):
        if kinds[content[j]][0] != _TEXT:
            j += 1
            continue
        e = j
        while e < len(content) and kinds[content[e]][0] == _TEXT:
            e += 1
        run = content[j:e]
        if (j > 0 and e < len(content) and len(run) <= 3
                and kinds[content[j - 1]][0] in (_DATA, _MIXED, _GAP)
                and kinds[content[e]][0] in _NUMERIC_ROWS
                and not any(_header_like(lines[i], delim) for i in run)):
            stray.update(run)
        j = e
    return stray


def _first_run(lines, kinds, complete: bool, delim: str,
               min_rows: int = MIN_POINTS) -> int | None:
    """First numeric row followed by 3 more row-like rows (or by the end of the file).

    Short runs of text lines between numeric rows (:func:`_stray_lines`) do not break
    a run: they are skipped, with a note, when the data block is read.
    """
    stray = _stray_lines(lines, kinds, delim)
    content = [(i, k) for i, (k, _) in enumerate(kinds)
               if k not in (_BLANK, _COMMENT_ROW) and i not in stray]
    for j, (i, k) in enumerate(content):
        if k not in (_DATA, _MIXED, _WIDE):
            continue
        follow = content[j + 1:j + 4]
        if not all(kk in _ROWLIKE for _, kk in follow):
            continue
        if k == _MIXED and not all(kk == _MIXED and kinds[ii][1] == kinds[i][1]
                                   for ii, kk in follow):
            continue                 # words and numbers in a header line, not a text column
        if len(follow) < 3 and complete:
            n_data = sum(1 for _, kk in content[j:] if kk in _NUMERIC_ROWS or kk == _BROKEN)
            if n_data < min_rows:
                return None
        # Damaged first rows belong to the data and must be reported, not skipped,
        # also when rows of missing values ("-nan") sit among them.
        k = j
        while k > 0 and content[k - 1][1] in (_BROKEN, _GAP):
            k -= 1
        j = next((t for t in range(k, j) if content[t][1] == _BROKEN), j)
        return content[j][0]
    return None


def _stray_rows_before(lines, kinds, start: int, n_columns: int) -> list:
    """A note on numeric rows above the table, cut off from it by text: not read."""
    rows = [i for i, (k, nf) in enumerate(kinds[:start]) if k == _DATA and nf == n_columns]
    if not rows:
        return []
    shown = ", ".join(f"line {i + 1} ({lines[i].strip()[:30]!r})" for i in rows[:3])
    more = f" and {len(rows) - 3} more" if len(rows) > 3 else ""
    return [f"{shown}{more} above the table look{'s' if len(rows) == 1 else ''} like data but "
            f"{'is' if len(rows) == 1 else 'are'} separated from it by text and "
            f"{'was' if len(rows) == 1 else 'were'} not read; check the file if "
            f"{'it belongs' if len(rows) == 1 else 'they belong'} to the spectrum"]


def _one_column(path, line: int, text: str) -> SpectrumFormatError:
    return _fail(path, line, "only one column of numbers was found; a spectrum needs the "
                 "wavelength and the T or R value on each line: export both columns",
                 expected="two columns (wavelength and T or R) separated by tab, ';', ',' or "
                          "spaces", found=text.strip()[:80])


def _garbled(lines) -> bool:
    """Text decoded with the wrong codec: C1 control characters or mostly non-ASCII."""
    head = "".join(lines[:50])
    chars = [c for c in head if not c.isspace()]
    if not chars:
        return False
    if any("\x80" <= c <= "\x9f" for c in chars):
        return True
    return sum(1 for c in chars if ord(c) > 127) > 0.3 * len(chars)


_DIGITS = re.compile(r"\d+\Z")


def _decimal_comma_column(lines, kinds, delim, dec) -> int | None:
    """Index of the first data line if the "two columns" are one column of decimal-comma
    numbers ("450,5" read as 450 and 5), else None.

    Only a comma-separated table of bare digits is ambiguous. It is taken as one column
    when the digits after the comma are fractional digits (a leading zero, as in
    "87,05") or the part before it is no abscissa (it repeats or goes back and forth).
    """
    if delim != "," or dec != ".":
        return None
    rows = [(i, lines[i].strip()) for i, (k, nf) in enumerate(kinds) if k == _DATA]
    if not rows or any(nf != 2 for k, nf in kinds if k == _DATA):
        return None
    pairs = []
    for _, line in rows:
        left, _, right = line.partition(",")
        left, right = left.strip(), right.strip()
        if not (_DIGITS.match(left) and _DIGITS.match(right)):
            return None
        pairs.append((left, right))
    leading_zero = any(len(r) > 1 and r.startswith("0") for _, r in pairs)
    x = np.array([float(a) for a, _ in pairs])
    d = np.diff(x)
    not_abscissa = d.size > 0 and not (np.all(d > 0) or np.all(d < 0))
    return rows[0][0] if leading_zero or not_abscissa else None


def _first_broken(lines, evidence: dict) -> tuple[int, str] | None:
    """(line index, damaged token) of the first damaged row ("300<tab>313·14") under the
    dialect with most of them, or None."""
    if "broken" not in evidence:
        return None
    rows, delim, numbers = evidence["broken"]
    toks = _split(lines[rows[0]].strip(), delim)
    return rows[0], next((t for t in toks if numbers.parse(t) is None), toks[0])


def _find_single(lines, options, evidence: dict) -> int | None:
    """Index of the first line of a one-column table of numbers, or None."""
    decs = DECIMALS if options.decimal == "auto" else (options.decimal,)
    for dec in decs:
        hits = evidence.get("single", {}).get(dec)
        if hits is None:                 # the delimiter was set: not scanned for spaces
            numbers = _Numbers(dec)
            hits = [i for i, line in enumerate(lines)
                    if _row_kind(line, " ", numbers)[0] == _SINGLE]
        if len(hits) >= 2:
            return hits[0]
    return None


def _preamble(lines, delim, numbers, n_columns):
    """Column names, their line, metadata, comments and metadata style."""
    metadata: dict = {}
    comments: list = []
    styles: list = []
    content = [i for i, line in enumerate(lines)
               if line.strip() and not _is_comment(line.strip())]
    names, header_idx, units_idx = (), None, None
    if content:
        last = content[-1]
        toks = _header_tokens(lines[last], delim, n_columns)
        if toks is not None and numbers.parse(toks[0]) is None \
                and not toks[0].endswith((":", "=")) \
                and not any(_QUANTITY_VALUE.match(t) for t in toks[1:]):
            header_idx = last
            names = toks
            if len(content) > 1:
                above = _header_tokens(lines[content[-2]], delim, n_columns)
                if above is not None and all(_is_unit_cell(t) for t in toks) \
                        and numbers.parse(above[0]) is None:
                    # Two header lines: names above, units below.
                    units_idx, header_idx = last, content[-2]
                    names = tuple(f"{a} [{u}]" if u else a for a, u in zip(above, toks))
    for i, line in enumerate(lines):
        s = line.strip()
        if not s or i in (header_idx, units_idx):
            continue
        if _is_comment(s):
            body = _COMMENT.sub("", s, count=1).lstrip("#").strip()
            kv = _key_value(body)
            if kv:
                _add(metadata, kv[0], kv[1])
                styles.append("comment")
            elif body:
                comments.append(body)
            continue
        kv = _key_value(s)
        toks = _split(s, delim)
        if kv and (len(toks) < 2 or delim == " "):
            _add(metadata, kv[0], kv[1])
            styles.append(kv[2])
        elif len(toks) >= 2 and numbers.parse(toks[0]) is None and delim != " ":
            _add(metadata, toks[0].strip('"'), delim.join(t.strip('"') for t in toks[1:]))
            styles.append("delimited")
        elif kv:
            _add(metadata, kv[0], kv[1])
            styles.append(kv[2])
        else:
            comments.append(s)
    style = max(set(styles), key=styles.count) if styles else "none"
    return names, (None if header_idx is None else header_idx + 1), metadata, comments, style


_UNIT_CELLS = {"", "%", "%t", "%r", "a.u.", "au", "arb. u.", "-", "1", "counts", "cts", "abs"}


def _is_unit_cell(token: str) -> bool:
    """A cell of a units row under the column names: "nm", "[%]", "(a.u.)"."""
    t = token.strip().strip("()[]{} ")
    return _unit_word(t) is not None or _norm_text(t) in _UNIT_CELLS


def _add(metadata: dict, key: str, value: str):
    key = key or "?"
    k, n = key, 2
    while k in metadata:
        k, n = f"{key} ({n})", n + 1
    metadata[k] = value


def _header_tokens(line: str, delim: str, n_columns: int):
    """Column names of a header line, padded to ``n_columns``, or None."""
    s = line.strip()
    if len(s) > 4096:
        return None
    toks = _split(s, delim)
    if delim == " " and len(toks) != n_columns:
        # "Wavelength (nm)  T (%)": names with spaces, split on wide gaps or
        # keep bracketed units with the word before them.
        wide = [t for t in re.split(r"\s{2,}|\t", s) if t]
        if len(wide) == n_columns:
            toks = wide
        else:
            merged: list = []
            for t in toks:
                if merged and (t[0] in "([{" or merged[-1][-1] in "/"):
                    merged[-1] += " " + t
                else:
                    merged.append(t)
            toks = merged
    toks = [t.strip().strip('"').strip() for t in toks]
    if len(toks) < 2 and n_columns >= 2:
        return None
    if len(toks) > n_columns:
        if any(toks[n_columns:]):
            return None
        toks = toks[:n_columns]
    return tuple(toks) + ("",) * (n_columns - len(toks))


# --------------------------------------------------------------------------- data block

def _line_offsets(text: str, start: int) -> int:
    pos = 0
    for _ in range(start):
        pos = text.index("\n", pos) + 1
    return pos


def _data_block(text: str, layout: _Layout) -> tuple[str, list, bool]:
    """The data lines (as one string), the footer lines after them, and whether the
    data run to the very end of the file, with no line break after the last row."""
    begin = _line_offsets(text, layout.start)
    block = text[begin:]
    footer: list = []
    sect = re.search(r"\n[ \t]*\[[^\]\n]{0,200}\][ \t]*(?=\n|\Z)", block)
    if sect:
        footer = block[sect.start() + 1:].split("\n", _MAX_FOOTER)
        block = block[:sect.start()]
    numbers = _Numbers(layout.decimal)
    # Trailing lines that are plainly not data (text, key: value, comments), walked
    # back by index so that a long tail costs one pass, not one copy per line.
    tail: list = []
    end = len(block)
    while end > 0 and len(tail) < 5000:
        cut = block.rfind("\n", 0, end)
        last = block[cut + 1:end]
        s = last.strip()
        if s and not _is_comment(s):
            toks = _split(s, layout.delimiter)
            if not (s[0].isalpha() or s[0] in "[*=_") or numbers.parse(toks[0]) is not None \
                    or _is_text_column_row(toks, layout):
                break
        tail.append(last)
        end = max(cut, 0)
    open_end = not sect and not tail
    block = block[:end]
    footer = [t[:500] for t in reversed(tail) if t.strip()] + \
        [t[:500] for t in footer if t.strip()]
    if len(footer) > _MAX_FOOTER:
        footer = footer[:_MAX_FOOTER] + [f"... (footer cut after {_MAX_FOOTER} lines)"]
    return block, footer, open_end


def _digits(token: str) -> int:
    return sum(ch.isdigit() for ch in token)


def _cut_short_last_line(block: str, layout: _Layout, first_line: int):
    """``block`` without its last line if the file ends inside that line, and a note.

    A file whose last row has no line break after it and fewer fields, or fewer digits
    in its last field, than the rows above was cut off while being written ("551,8"
    after rows of "550,81.49"): reading it would give a wrong point (8 % instead of
    81 %). Complete last rows without a line break are common and are kept.
    """
    cut = block.rfind("\n")
    last = block[cut + 1:].strip()
    if cut < 0 or not last or _is_comment(last):
        return block, None
    above, end = [], cut
    while end > 0 and len(above) < 20:
        prev = block.rfind("\n", 0, end)
        line = block[prev + 1:end].strip()
        end = max(prev, 0)
        if line and not _is_comment(line):
            above.append(_split(line, layout.delimiter))
    if not above:
        return block, None
    toks = _split(last, layout.delimiter)
    counts = [len(t) for t in above]
    usual = max(set(counts), key=counts.count)
    same = [t for t in above if len(t) == usual]
    short = len(toks) < usual or (
        len(toks) == usual and _digits(toks[-1]) < min(_digits(t[-1]) for t in same))
    if not short:
        return block, None
    line = first_line + block.count("\n")
    return block[:cut], (f"the last line (line {line}, {last[:40]!r}) has no line break after "
                         "it and is shorter than the rows above it: the file was cut off "
                         "while being saved, so that line was not read; export the spectrum "
                         "again if its last point matters")


def _parse_fast(block: str, layout: _Layout, cols: tuple) -> np.ndarray | None:
    """The whole block in one :func:`numpy.loadtxt` call, or None if it needs care."""
    if '"' in block:
        return None
    if layout.decimal == ",":
        if "." in block:
            return None                      # thousands groups
        block = block.replace(",", ".")
    elif "," in block and layout.delimiter != ",":
        return None
    try:
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore")
            arr = np.loadtxt(io.StringIO(block), dtype=float, comments=None, ndmin=2,
                             delimiter=None if layout.delimiter == " " else layout.delimiter,
                             usecols=cols)
    except (ValueError, IndexError, OverflowError):
        return None
    if arr.shape[0] != block.count("\n") + 1:   # loadtxt skipped blank lines
        return None
    return arr


@dataclass
class _Rows:
    """Numbers of the chosen columns of the data block, and what was skipped (internal)."""

    table: np.ndarray                   # (rows, columns), NaN for a missing value
    line_no: np.ndarray                 # 1-based line of each row
    thousands: bool = False             # thousands groups seen ("1,234.5")
    stray: list = None                  # (line, text) of text lines skipped


def _column_label(layout: _Layout, c: int) -> str:
    name = layout.names[c] if c < len(layout.names) and layout.names[c] else ""
    return f"column {c + 1}" + (f" ({name!r})" if name else "")


def _is_text_column_row(toks: list, layout: _Layout) -> bool:
    """A row of a table whose first column is text ("PMT;400;87.2")."""
    return 0 in layout.text_columns and len(toks) == layout.n_columns


def _is_text_line(s: str, toks: list, layout: _Layout) -> bool:
    """A note between data rows ("Lamp change"), not a damaged row ("403;5O")."""
    if _is_text_column_row(toks, layout):
        return False
    return s[0].isalpha() or not _HAS_DIGIT.search(s)


def _parse_slow(block: str, layout: _Layout, cols: tuple, first_line: int, path) -> _Rows:
    """Line by line, exact: missing values, comments, quotes, thousands groups and text
    lines between the rows (skipped and listed; column names repeated, or more than
    :data:`_MAX_STRAY` text lines, mean several tables or damage and are refused)."""
    numbers = _Numbers(layout.decimal)
    out, line_no, stray = [], [], []
    for i, line in enumerate(block.split("\n")):
        s = line.strip()
        if not s or _is_comment(s):
            continue
        if len(s) > _MAX_LINE:
            raise _fail(path, first_line + i, "line is too long for a row of a spectrum table; "
                        "check that this is a spectrum export",
                        expected=f"at most {_MAX_LINE} characters", found=s[:40] + "...")
        toks = _split(s, layout.delimiter)
        row = []
        for c in cols:
            v = numbers.parse(toks[c]) if c < len(toks) else math.nan
            if v is None:
                break
            row.append(v)
        if len(row) < len(cols):
            if not _is_text_line(s, toks, layout):
                c = cols[len(row)]
                raise _fail(path, first_line + i, f"{_column_label(layout, c)} holds text "
                            f"where a number is expected; correct or delete that line",
                            expected=f"a number with decimal mark {layout.decimal!r}, columns "
                            f"separated by {_DELIMITER_NAMES[layout.delimiter]}",
                            found=toks[c][:60])
            if _header_like(s, layout.delimiter, layout.header_text):
                raise _fail(path, first_line + i, "column names again: the file holds more "
                            "than one table; save each spectrum in a file of its own",
                            expected="one table of numbers", found=s[:80])
            stray.append((first_line + i, s))
            if len(stray) > _MAX_STRAY:
                raise _fail(path, stray[0][0], f"more than {_MAX_STRAY} lines of text among "
                            "the data rows: this is not one spectrum table, or it is damaged; "
                            "export the spectrum again as one table",
                            expected="rows of numbers", found=stray[0][1][:80])
            continue
        out.append(row)
        line_no.append(first_line + i)
    arr = np.array(out, dtype=float).reshape(-1, len(cols))
    return _Rows(arr, np.array(line_no, dtype=np.int64), numbers.seen_thousands, stray)


_LETTER_LINE = re.compile(r"^[ \t]*[^\W\d_].*$", re.M)


def _parse_fast_around_text(block: str, layout: _Layout, cols: tuple,
                            first_line: int) -> _Rows | None:
    """The fast path for a block with a few text lines ("Lamp change") among its rows:
    each becomes a row of NaN for :func:`numpy.loadtxt` and is then taken out again,
    so one note in a million rows does not send them all down the slow path. None if
    this does not apply; the slow path then decides (and reports) exactly."""
    if 0 in layout.text_columns:
        return None
    numbers = _Numbers(layout.decimal)
    found = []
    for m in _LETTER_LINE.finditer(block):
        s = m.group().strip()
        if _is_comment(s):
            continue
        toks = _split(s, layout.delimiter)
        if all(c < len(toks) and numbers.parse(toks[c]) is not None for c in cols):
            continue                         # "nan;50": a row, read as usual
        if len(found) == _MAX_STRAY or _header_like(s, layout.delimiter, layout.header_text):
            return None
        found.append(m)
    if not found:
        return None
    filler = ("\t" if layout.delimiter == " " else layout.delimiter).join(
        ["nan"] * layout.n_columns)
    pieces, pos = [], 0
    for m in found:
        pieces += [block[pos:m.start()], filler]
        pos = m.end()
    table = _parse_fast("".join(pieces) + block[pos:], layout, cols)
    if table is None:
        return None
    index, line, pos = [], 0, 0
    for m in found:                          # line of each, counted in one pass
        line += block.count("\n", pos, m.start())
        pos = m.start()
        index.append(line)
    keep = np.ones(table.shape[0], dtype=bool)
    keep[index] = False
    line_no = first_line + np.arange(table.shape[0], dtype=np.int64)
    stray = [(int(first_line + i), m.group().strip()) for i, m in zip(index, found)]
    return _Rows(table[keep], line_no[keep], False, stray)


def _stray_note(stray: list) -> str:
    shown = ", ".join(f"line {n} ({t[:30]!r})" for n, t in stray[:5])
    more = f" and {len(stray) - 5} more" if len(stray) > 5 else ""
    if len(stray) == 1:
        return (f"{shown} is text between data rows and was skipped; the rows around it were "
                "read as usual")
    return (f"{len(stray)} lines of text between data rows were skipped: {shown}{more}; the "
            "rows around them were read as usual")


def _read_rows(text: str, layout: _Layout, cols: tuple, path, notes: list) -> tuple:
    """(rows, footer) of the data block: fast path, else line by line; notes appended."""
    block, footer, open_end = _data_block(text, layout)
    first_line = layout.start + 1
    if open_end:
        block, note = _cut_short_last_line(block, layout, first_line)
        if note:
            notes.append(note)
    table = _parse_fast(block, layout, cols)
    if table is not None:
        rows = _Rows(table, first_line + np.arange(table.shape[0], dtype=np.int64), False, [])
    else:
        rows = _parse_fast_around_text(block, layout, cols, first_line) or \
            _parse_slow(block, layout, cols, first_line, path)
    if rows.stray:
        notes.append(_stray_note(rows.stray))
    return rows, footer


# --------------------------------------------------------------------------- columns

def _resolve_column(spec, names, n_columns, which, path, header_line):
    if isinstance(spec, int):
        if spec >= n_columns:
            raise _fail(path, header_line, f"{which} column {spec} does not exist; set the "
                    f"reader's {which}_column to one of the file's columns",
                        expected=f"an index from 0 to {n_columns - 1}", found=str(spec))
        return spec
    if not any(names):
        raise _fail(path, header_line, f"{which} column {spec!r} was given by name, but the file "
                    "has no column names; give the column by its index (0 is the first)",
                    expected="a column index (0, 1, ...)", found=spec)
    want = _norm_text(spec)
    normed = [_norm_text(n) for n in names]
    if want in normed:
        return normed.index(want)
    hits = [i for i, n in enumerate(normed) if want in n]
    if len(hits) == 1:
        return hits[0]
    raise _fail(path, header_line, f"no single {which} column is named {spec!r}; use "
                f"one of the file's column names for {which}_column",
                expected="one of " + ", ".join(repr(n) for n in names if n), found=spec)


def _is_index(col: np.ndarray) -> bool:
    c = col[np.isfinite(col)]
    return (c.size >= 3 and np.all(c == np.round(c)) and c[0] in (0.0, 1.0)
            and np.all(np.diff(c) == 1.0))


def _looks_like_abscissa(col: np.ndarray) -> bool:
    c = col[np.isfinite(col)]
    if c.size < 3 or c.size < 0.9 * col.size or _is_index(c):
        return False
    d = np.sign(np.diff(c))
    d = d[d != 0]
    return d.size > 0 and abs(d.sum()) >= 0.9 * d.size


def _looks_like_ordinate(col: np.ndarray) -> bool:
    """Values a T, R or absorbance column can hold (fraction, percent or A)."""
    c = col[np.isfinite(col)]
    return c.size > 0 and float(c.min()) >= -5.0 and float(c.max()) <= 150.0


def _choose_columns(layout: _Layout, options: ReaderOptions, path) -> tuple[int, int]:
    names, n = layout.names or ("",) * layout.n_columns, layout.n_columns
    x = y = None
    if options.x_column is not None:
        x = _resolve_column(options.x_column, names, n, "x", path, layout.header_line)
    if options.y_column is not None:
        y = _resolve_column(options.y_column, names, n, "y", path, layout.header_line)
    if x is not None and x == y:
        raise _fail(path, layout.header_line, "x and y columns are the same column; choose two "
                    "different columns",
                    expected="two different columns", found=str(x))
    for c, which in ((x, "x"), (y, "y")):
        if c is not None and c in layout.text_columns:
            raise _fail(path, layout.start + 1, f"the {which} column, {_column_label(layout, c)}, "
                        "holds text, not numbers; choose a column of numbers",
                        expected="a column of numbers",
                        found=", ".join(layout.text_examples.get(c, [])))
    free = [i for i in range(n) if i not in (x, y) and i not in layout.text_columns]
    if x is None:
        if not free:
            raise _fail(path, layout.start + 1, "no column of numbers is left for the "
                        "wavelength; check the reader's x_column and y_column",
                        expected="a column of wavelengths",
                        found=f"{n} column(s), {len(layout.text_columns)} of them text")
        x = next((i for i in free if _abscissa_label(names[i])[0]
                  and _ordinate_label(names[i]) is None), None)
        if x is None:
            x = next((i for i in free if _looks_like_abscissa(layout.sample[:, i])), None)
        if x is None:
            x = next((i for i in free if not _is_index(layout.sample[:, i])), free[0])
        free.remove(x)
    if y is None:
        if not free:
            raise _fail(path, layout.start + 1, "only one column of numbers is left for the "
                        "values; check the reader's x_column and y_column",
                        expected="a second column of numbers",
                        found=f"{n} column(s)" + (f", {len(layout.text_columns)} of them text"
                                                  if layout.text_columns else ""))
        usable = [i for i in free if np.isfinite(layout.sample[:, i]).mean() >= 0.5
                  and not _is_index(layout.sample[:, i])]
        y = next((i for i in usable if _ordinate_label(names[i]) is not None), None)
        if y is None and options.y_kind != "counts":
            y = next((i for i in usable if _looks_like_ordinate(layout.sample[:, i])), None)
        if y is None:
            y = usable[0] if usable else free[0]
    return x, y


def _text_column_note(layout: _Layout) -> str | None:
    if not layout.text_columns:
        return None
    parts = []
    for c in layout.text_columns:
        words = ", ".join(repr(w) for w in layout.text_examples.get(c, []))
        parts.append(f"{_column_label(layout, c)} holds text" + (f" ({words})" if words else "")
                     + " and was not read")
    return "; ".join(parts) + "; wavelength and values were taken from the columns of numbers"


# --------------------------------------------------------------------------- inference

_X_KEYS = {"xunits", "xunit", "xaxis", "xaxisunit", "xaxisunits", "abscissa", "abscissaunit",
           "abscissaunits", "wavelengthunit", "wavelengthunits", "xlabel", "unitsx", "xdim"}
_Y_KEYS = {"yunits", "yunit", "yaxis", "yaxisunit", "yaxisunits", "ordinate", "ordinateunit",
           "ordinateunits", "ylabel", "datatype", "mode", "measurementmode", "quantity",
           "unitsy", "ymode", "measurement", "datamode"}


def _meta_lookup(metadata: dict, keys) -> list:
    return [v for k, v in metadata.items() if re.sub(r"[^a-z]", "", k.lower()) in keys]


def _uniform(v: np.ndarray) -> bool:
    with np.errstate(all="ignore"):
        d = np.diff(v)
        return bool(d.size >= 2 and abs(d.mean()) > 0
                    and float(np.std(d) / abs(d.mean())) < 0.02)


def _infer_x_unit(x: np.ndarray, name: str, metadata: dict, notes: list) -> tuple[str, str]:
    unit = _abscissa_label(name)[1] if name else None
    if unit:
        return unit, "header"
    for value in _meta_lookup(metadata, _X_KEYS):
        unit = _abscissa_label(value)[1]
        if unit:
            return unit, "metadata"
    pos = x[np.isfinite(x) & (x > 0)]
    hi = float(pos.max()) if pos.size else 0.0
    s = np.sort(pos)
    if hi <= 30:
        if _uniform(1.0 / s) and not _uniform(s):
            notes.append(f"abscissa values up to {hi:g} read as photon energy in eV (the grid "
                         "is even in 1/E, as after conversion from nm); set x_unit if they "
                         "are µm")
            return "eV", "values"
        notes.append(f"abscissa values up to {hi:g} read as µm; photon energy in eV is also "
                     "possible: name the column (e.g. 'Energy (eV)') or set x_unit")
        return "um", "values"
    if hi <= 6000:
        if hi > 3500:
            notes.append(f"abscissa values up to {hi:g} read as nm; if they are wavenumbers, "
                         "set x_unit='cm-1'")
        return "nm", "values"
    notes.append(f"abscissa values up to {hi:g} read as wavenumbers in cm⁻¹; if they are "
                 "Å, set x_unit='A'")
    return "cm-1", "values"


def _infer_y_kind(y: np.ndarray, lines: np.ndarray, name: str, metadata: dict, path,
                  notes: list) -> tuple[str, str]:
    what, scale, origin = None, None, "values"
    stated = _ordinate_label(name) if name else None
    if stated:
        (what, scale), origin = stated, "header"
    if what is None or (scale is None and what in ("T", "R")):
        for value in _meta_lookup(metadata, _Y_KEYS):
            found = _ordinate_label(value)
            if found:
                if what is None:
                    what, origin = found[0], "metadata"
                if found[0] == what and scale is None and found[1]:
                    scale, origin = found[1], "metadata"
                break
    what = what or "T"
    kind = _kind_from(what, scale)
    if kind:
        return kind, origin
    finite = np.isfinite(y)
    top = float(y[finite].max()) if finite.any() else 0.0
    if top <= 1.5:
        if top < 0.2:
            notes.append(f"all values are below {top:.3g} and were read as a fraction; if "
                         f"they are percent, set y_kind='{what}_percent'")
        return f"{what}_fraction", origin
    if top <= 150:
        return f"{what}_percent", origin
    at = int(np.flatnonzero(finite & (y == top))[0])
    raise _fail(path, int(lines[at]), f"values up to {top:g} are neither a fraction (0-1) nor "
                "percent (0-100) of T or R; if the file holds raw detector counts, set the "
                "reader's y_kind='counts' and correct the counts with dark and 100 % "
                "reference scans first", expected="transmittance or reflectance",
                found=f"{top:g}")


_QUANTITY_WORDS = {"T": "transmittance T", "R": "reflectance R"}


def _check_stated_quantity(name: str, column: int, y_kind: str, header_line, path):
    """Refuse a y kind of T (or R) for a column whose name says R (or T): fitting a
    reflectance spectrum as a transmittance one gives a wrong answer without a sign."""
    want = y_kind[0] if y_kind in ("T_fraction", "T_percent", "R_fraction", "R_percent") \
        else ("T" if y_kind == "absorbance" else None)
    stated = _ordinate_label(name) if name else None
    have = stated[0] if stated else None
    if want is None or have not in ("T", "R") or have == want:
        return
    raise _fail(path, header_line, f"column {column + 1} ({name!r}) holds "
                f"{_QUANTITY_WORDS[have]}, but the reader is set to read "
                f"{_QUANTITY_WORDS[want]} (y_kind={y_kind!r}); use a {_QUANTITY_WORDS[want]} "
                "file, or set y_kind='auto' in the recipe's reader section",
                expected=f"a {_QUANTITY_WORDS[want]} column", found=name)


def _order_of(x: np.ndarray) -> str:
    d = np.diff(x)
    if np.all(d >= 0):
        return "ascending"
    if np.all(d <= 0):
        return "descending"
    return "unsorted"


# --------------------------------------------------------------------------- reading

@dataclass
class _Parsed:
    dialect: Dialect
    wavelength_nm: np.ndarray
    values: np.ndarray
    line_no: np.ndarray
    metadata: dict
    warnings: list


def _source_bytes(source) -> tuple[bytes, str]:
    """(content, path label) of a path, bytes or text."""
    if isinstance(source, (bytes, bytearray, memoryview)):
        return bytes(source), "<bytes>"
    if isinstance(source, str) and ("\n" in source or "\r" in source):
        return source.encode("utf-8"), "<text>"
    path = os.fspath(source)
    try:
        with open(path, "rb") as fh:
            return fh.read(), str(path)
    except OSError as exc:
        raise _fail(path, None, f"cannot read the file ({exc.strerror or exc}); check the "
                    "path and that you may read the file") from exc


def _parse(raw: bytes, options: ReaderOptions, path) -> _Parsed:
    text, encoding = _decode(raw, options.encoding, path)
    layout = _layout(text, options, path)
    _refuse_compressed_jcamp(text, layout, path)
    xc, yc = _choose_columns(layout, options, path)
    first_line = layout.start + 1
    notes: list = [n for n in [_text_column_note(layout)] if n] + list(layout.notes or [])
    rows, footer = _read_rows(text, layout, (xc, yc), path, notes)
    table, line_no = rows.table, rows.line_no
    x, y = table[:, 0], table[:, 1]
    n_rows = x.size
    warn: list = []
    names = layout.names or ("",) * layout.n_columns

    keep = np.isfinite(x)
    if options.x_unit != "auto":
        x_unit, x_from = options.x_unit, "option"
    else:
        x_unit, x_from = _infer_x_unit(x[keep], names[xc], layout.metadata, warn)
    bad_x = keep & (x <= 0)
    if bad_x.any():
        at = int(np.flatnonzero(bad_x)[0])
        raise _fail(path, int(line_no[at]), "the abscissa must be positive; correct or delete "
                    "that line", expected=f"a wavelength, wavenumber or energy above 0 "
                    f"({x_unit})", found=f"{x[at]:g}")
    wl = to_nm(x, x_unit)
    # 1e-320 Å underflows to 0 nm, 1e-320 eV overflows to inf nm: no wavelength at all.
    bad_wl = keep & ~(np.isfinite(wl) & (wl > 0))
    if bad_wl.any():
        at = int(np.flatnonzero(bad_wl)[0])
        raise _fail(path, int(line_no[at]), f"the abscissa value {x[at]:g} {x_unit} is no "
                    "usable wavelength (too small or too large to convert to nm); correct "
                    "that line or set the reader's x_unit",
                    expected="a wavelength, wavenumber or energy of a UV-Vis-NIR spectrum",
                    found=f"{x[at]:g}")
    order = _order_of(x[keep])
    if options.y_kind != "auto":
        y_kind, y_from = options.y_kind, "option"
        _check_stated_quantity(names[yc], yc, y_kind, layout.header_line, path)
    else:
        y_kind, y_from = _infer_y_kind(y[keep], line_no[keep], names[yc], layout.metadata,
                                       path, warn)
    val = _to_fraction(y, y_kind)
    ok = keep & np.isfinite(val)
    dropped = int(n_rows - ok.sum())
    if dropped:
        bad_lines = line_no[~ok]
        shown = ", ".join(str(int(n)) for n in bad_lines[:5])
        more = f" and {dropped - 5} more" if dropped > 5 else ""
        warn.insert(0, f"{dropped} row(s) without a usable number in the wavelength or value "
                       f"column were dropped (line {shown}{more})")
    warn[:0] = notes
    wl, val, lines_ok = wl[ok], val[ok], line_no[ok]
    if wl.size < MIN_POINTS:
        at = int(lines_ok[0]) if lines_ok.size else first_line
        raise _fail(path, at, f"only {wl.size} usable data points, at least {MIN_POINTS} are "
                    "needed; check that the right columns are read and that the rows hold "
                    "numbers", expected=f"{MIN_POINTS} or more rows with a wavelength and a value",
                    found=f"{wl.size} point(s)")
    if order == "unsorted":
        warn.append("the wavelengths were not in order and have been sorted")
    # Reversing is free and sorting a million points is the slowest step: sort only
    # when the grid is neither ascending nor descending.
    if wl.size > 1 and wl[0] > wl[-1]:
        wl, val = wl[::-1], val[::-1]
    if not np.all(np.diff(wl) > 0):
        idx = np.argsort(wl, kind="stable")
        wl, val = wl[idx], val[idx]
    if np.any(np.diff(wl) == 0):
        uniq, inverse, counts = np.unique(wl, return_inverse=True, return_counts=True)
        n_dup = int(wl.size - uniq.size)
        warn.append(f"{n_dup} repeated wavelength(s) found; the values at each were averaged")
        # Each value divided first: the sum of two values near 1e308 would overflow.
        val = np.bincount(inverse, weights=val / counts[inverse])
        wl = uniq
        if wl.size < MIN_POINTS:
            raise _fail(path, first_line, f"only {wl.size} distinct wavelengths, at least "
                        f"{MIN_POINTS} are needed; check that the wavelength column is the "
                        "right one (x_column)", expected="distinct wavelengths",
                        found=f"{wl.size}")
    if y_kind != "counts":
        _flag_range(wl, val, warn)

    dialect = Dialect(
        delimiter=layout.delimiter, decimal=layout.decimal,
        thousands=("," if layout.decimal == "." else ".") if rows.thousands else "",
        encoding=encoding, newline=_newline_of(raw, encoding), x_unit=x_unit, y_kind=y_kind,
        columns=layout.names, metadata_style=layout.metadata_style, x_order=order,
        header_lines=layout.start, n_columns=layout.n_columns, x_column=xc, y_column=yc,
        x_unit_from=x_from, y_kind_from=y_from, n_rows=int(n_rows),
        text_columns=layout.text_columns)
    metadata = {"header": layout.metadata}
    if layout.comments:
        metadata["comments"] = layout.comments
    if footer:
        metadata["footer"] = footer
    metadata["reader"] = dict(dialect.to_dict(), dropped_rows=dropped,
                              data_lines=[int(line_no[0]), int(line_no[-1])] if n_rows else [],
                              skipped_lines=[int(n) for n, _ in rows.stray],
                              options=options.to_dict())
    metadata["ordinate"] = "counts" if y_kind == "counts" else "fraction"
    return _Parsed(dialect, wl, val, lines_ok, metadata, warn)


def _refuse_compressed_jcamp(text: str, layout: _Layout, path):
    """JCAMP-DX (X++(Y..Y)) rows hold one x and many y values: refuse, do not misread."""
    for key, value in layout.metadata.items():
        if re.sub(r"[^a-z]", "", key.lower()) == "xydata" and "++" in value:
            m = re.search(r"^.*XYDATA.*$", text, re.M | re.I)
            line = text.count("\n", 0, m.start()) + 1 if m else None
            raise _fail(path, line, "compressed JCAMP-DX data (X++(Y..Y)) is not supported; "
                        "export the spectrum as XY pairs or as CSV",
                        expected="a two-column table, e.g. JCAMP-DX (XY..XY) or CSV",
                        found=value[:40])


def _flag_range(wl: np.ndarray, val: np.ndarray, warn: list):
    low, high = val < 0, val > 1
    if low.any():
        i = int(np.argmin(val))
        warn.append(f"{int(low.sum())} value(s) below 0 % kept (lowest {100 * val[i]:.3g} % at "
                    f"{wl[i]:.6g} nm); slightly negative values are normal noise near 0 %, "
                    "large ones point to a dark-signal problem")
    if high.any():
        i = int(np.argmax(val))
        warn.append(f"{int(high.sum())} value(s) above 100 % kept (highest {100 * val[i]:.4g} % "
                    f"at {wl[i]:.6g} nm); values slightly above 100 % are normal noise, large "
                    "ones point to a 100 % line (baseline) problem")


def _finish(parsed: _Parsed, options: ReaderOptions, raw: bytes, path: str,
            name: str) -> Spectrum:
    spec = Spectrum(wavelength_nm=parsed.wavelength_nm, values=parsed.values,
                    quantity="R" if parsed.dialect.y_kind.startswith("R") else "T",
                    name=options.name or name, source=path,
                    sha256=hashlib.sha256(raw).hexdigest(), metadata=parsed.metadata,
                    warnings=tuple(parsed.warnings))
    if options.sigma == "estimate":
        # The estimate scales with the values; raw counts near the largest double would
        # overflow its differences, so they are estimated in units of their maximum.
        top = float(np.max(np.abs(spec.values)))
        scale = top if top > 1e150 else 1.0
        with np.errstate(over="ignore"):
            sigma = estimate_noise(spec.values / scale) * scale
        if not np.all(np.isfinite(sigma)):
            raise _fail(path, None, f"values up to {top:g} are too large to estimate their "
                        "noise; check the file, or read it without sigma='estimate'",
                        expected="values below 1e307", found=f"{top:g}")
        spec = replace(spec, sigma=sigma)
    elif options.sigma is not None:
        spec = replace(spec, sigma=np.full(len(spec), float(options.sigma)))
    if options.range_nm is not None:
        lo, hi = options.range_nm
        spec = spec.cropped(lo, hi)
        if len(spec) < MIN_POINTS:
            raise _fail(path, None, f"the range {lo:g}-{hi:g} nm keeps only {len(spec)} points; "
                        "widen range_nm",
                        expected=f"a range with at least {MIN_POINTS} points within "
                                 f"{parsed.wavelength_nm[0]:g}-{parsed.wavelength_nm[-1]:g} nm",
                        found=f"{len(spec)} point(s)")
    if options.mask_windows_nm:
        spec = spec.masked_windows(options.mask_windows_nm)
    return spec


def read_spectrum(path, *, options: ReaderOptions | None = None) -> Spectrum:
    """Read one spectrum file into a :class:`~fitting.spectrum.Spectrum`.

    Parameters
    ----------
    path : str or os.PathLike
        A delimited text file (see the module docstring for what is detected).
    options : ReaderOptions, optional
        Overrides for anything detected, plus range, mask and noise settings.

    Returns
    -------
    Spectrum
        Ascending wavelengths in nm, values as a fraction (raw signal for
        ``y_kind="counts"``), ``quantity`` "T" or "R", provenance (path and
        SHA-256 of the bytes), ``metadata`` with the keys "header" (key/value
        lines), "comments", "footer", "reader" (the :class:`Dialect` found, as a
        dict) and "ordinate" ("fraction" or "counts"), and ``warnings``.

    Raises
    ------
    SpectrumFormatError
        The file cannot be read: empty, binary, undecodable, a single column,
        text in a numeric column, fewer than 5 points, values that are neither
        fraction nor percent, a non-positive abscissa, unknown column names,
        more than 256 columns, several tables or more than 20 text lines among
        the rows, or no table within the head of the file. The message names
        the file and line, what was expected and found, and what to do.

    Examples
    --------
    >>> s = read_spectrum("film_A.csv")                         # doctest: +SKIP
    >>> s = read_spectrum("film_A.csv", options=ReaderOptions(
    ...     x_unit="um", range_nm=(350, 2500), sigma="estimate"))  # doctest: +SKIP
    """
    options = options or ReaderOptions()
    raw, label = _source_bytes(Path(path) if isinstance(path, str) else path)
    parsed = _parse(raw, options, label)
    return _finish(parsed, options, raw, label, Path(label).stem)


def parse_spectrum(content: str | bytes, *, options: ReaderOptions | None = None,
                   source: str = "<text>", name: str = "") -> Spectrum:
    """Like :func:`read_spectrum`, for file content already in memory (pasted data).

    ``source`` is the label used in error messages and ``Spectrum.source``.
    """
    options = options or ReaderOptions()
    raw = content.encode("utf-8") if isinstance(content, str) else bytes(content)
    parsed = _parse(raw, options, source)
    return _finish(parsed, options, raw, source, name)


def sniff(source, *, options: ReaderOptions | None = None) -> Dialect:
    """The :class:`Dialect` of a file, or of text or bytes already in memory.

    ``source`` is a path (``os.PathLike``, or a ``str`` without a line break),
    ``bytes``, or text (a ``str`` with at least one line break). The whole file is parsed, so the
    detected units and ordinate kind are what :func:`read_spectrum` will use.

    Raises
    ------
    SpectrumFormatError
        As :func:`read_spectrum`.
    """
    raw, label = _source_bytes(source)
    return _parse(raw, options or ReaderOptions(), label).dialect


def preview(path, n_lines: int = 20, *, options: ReaderOptions | None = None) -> Preview:
    """First ``n_lines`` lines of a file plus the dialect the reader detects.

    For an import dialog: if the file cannot be read as it stands, the lines
    are still returned, with ``dialect=None`` and the reason in ``problem``.

    Raises
    ------
    SpectrumFormatError
        Only if the file cannot be opened or is not text at all (empty,
        binary, undecodable).
    """
    options = options or ReaderOptions()
    raw, label = _source_bytes(Path(path) if isinstance(path, str) else path)
    text, _ = _decode(raw, options.encoding, label)
    lines, _ = _head_lines(text, max(int(n_lines), 0))
    try:
        parsed = _parse(raw, options, label)
        dialect, problem, notes = parsed.dialect, "", tuple(parsed.warnings)
    except SpectrumFormatError as exc:
        dialect, problem, notes = None, str(exc), ()
    return Preview(path=label, lines=tuple(lines[:n_lines]), dialect=dialect, problem=problem,
                   notes=notes)


@dataclass(frozen=True)
class Table:
    """The columns of numbers of a delimited text table, read the way spectra are read.

    What :func:`read_table` returns, for tables that are not spectra (n, κ tables of
    materials): same dialect detection, same number syntax, same handling of text
    columns, stray text lines and a cut-off last line, same error messages.

    Attributes
    ----------
    path : str
        The file (or the label of text in memory).
    names : tuple of str
        Name of each column of numbers ("" where the file names none).
    columns : tuple of int
        0-based position of each of them in the file (text columns are left out).
    values : ndarray of shape (rows, len(columns))
        The numbers; NaN for a missing value or a cell a short row does not have.
    line_no : ndarray of int
        1-based line of each row, for messages.
    metadata : dict
        "Key: value" lines above the table.
    notes : tuple of str
        What was skipped or ignored, as in ``Spectrum.warnings``.
    """

    path: str
    names: tuple
    columns: tuple
    values: np.ndarray
    line_no: np.ndarray
    metadata: dict
    notes: tuple = ()

    def fail(self, row: int | None, reason: str, *, expected: str = "",
             found: str = "") -> SpectrumFormatError:
        """A :class:`SpectrumFormatError` naming the file and the line of ``row``."""
        line = None if row is None else int(self.line_no[row])
        return _fail(self.path, line, reason, expected=expected, found=found)


def read_table(source, *, options: ReaderOptions | None = None, min_rows: int = 2) -> Table:
    """Read every column of numbers of a delimited text table.

    Parameters
    ----------
    source : path, bytes or text
        As for :func:`sniff`.
    options : ReaderOptions, optional
        ``delimiter``, ``decimal`` and ``encoding`` are used; the rest is ignored.
    min_rows : int
        Fewest rows of numbers that make a table (a spectrum needs 5).

    Raises
    ------
    SpectrumFormatError
        As :func:`read_spectrum`: naming the file and line, what was expected and found.
    """
    options = options or ReaderOptions()
    raw, label = _source_bytes(source)
    text, _ = _decode(raw, options.encoding, label)
    layout = _layout(text, options, label, min_rows)
    cols = tuple(c for c in range(layout.n_columns) if c not in layout.text_columns)
    notes = [n for n in [_text_column_note(layout)] if n] + list(layout.notes or [])
    rows, _ = _read_rows(text, layout, cols, label, notes)
    names = layout.names or ("",) * layout.n_columns
    return Table(path=label, names=tuple(names[c] for c in cols), columns=cols,
                 values=rows.table, line_no=rows.line_no, metadata=dict(layout.metadata),
                 notes=tuple(notes))


def abscissa_unit(label: str) -> str | None:
    """Unit (one of :data:`X_UNITS`) a column name states, e.g. "Wavelength (µm)" -> "um";
    None if it states none."""
    return _abscissa_label(label)[1]


# --------------------------------------------------------------------------- writing

_X_COLUMN_NAMES = {"nm": "Wavelength (nm)", "um": "Wavelength (µm)", "A": "Wavelength (Å)",
                   "cm-1": "Wavenumber (cm-1)", "eV": "Energy (eV)"}
_Y_COLUMN_NAMES = {"T_fraction": "T", "T_percent": "T (%)", "absorbance": "Absorbance",
                   "R_fraction": "R", "R_percent": "R (%)", "counts": "Signal (counts)"}
_X_UNIT_WORDS = {"nm": "NANOMETERS", "um": "MICROMETERS", "A": "ANGSTROMS", "cm-1": "1/CM",
                 "eV": "ELECTRONVOLTS"}
_Y_UNIT_WORDS = {"T_fraction": "TRANSMITTANCE (fraction)", "T_percent": "%T",
                 "absorbance": "ABSORBANCE", "R_fraction": "REFLECTANCE (fraction)",
                 "R_percent": "%R", "counts": "COUNTS"}


def _format_numbers(values: np.ndarray, dialect: Dialect, precision: int) -> list:
    if dialect.thousands:
        text = [f"{v:,.6f}" if math.isfinite(v) else str(v) for v in values.tolist()]
        if dialect.decimal == ",":
            text = [t.translate({44: 46, 46: 44}) for t in text]
    else:
        fmt = f"{{:.{precision}g}}".format
        text = [fmt(v) for v in values.tolist()]
        if dialect.decimal == ",":
            text = [t.replace(".", ",") for t in text]
    if dialect.delimiter != " ":
        text = [f'"{t}"' if dialect.delimiter in t else t for t in text]
    return text


def write_spectrum(path, spectrum: Spectrum, *, dialect: Dialect | None = None,
                   precision: int = 10) -> Path:
    """Write a spectrum as a text table in the given :class:`Dialect`, atomically.

    The file is written to a temporary file in the same folder and renamed over
    ``path``, so a crash never leaves half a file.

    Parameters
    ----------
    path : str or os.PathLike
    spectrum : Spectrum
    dialect : Dialect, optional
        Delimiter, decimal mark, thousands separator, encoding, newline,
        abscissa unit, ordinate kind, column names, metadata style and row
        order. Default: tab-separated UTF-8, nm and T in percent, with a
        "Key: value" metadata block.
    precision : int
        Significant digits (without a thousands separator; with one, six
        decimals are written).

    Metadata written: ``spectrum.metadata["header"]`` items and other string or
    number entries of ``spectrum.metadata``, then "XUnits" and "YUnits" lines,
    and ``metadata["comments"]`` as ``#`` lines, unless the style is "none".

    Raises
    ------
    ParameterError
        If the ordinate kind does not fit the spectrum (R data as T, absorbance
        of R), the "delimited" style is asked for with whitespace or without a
        header line, or the text cannot be encoded.
    """
    d = dialect or Dialect()
    if not isinstance(spectrum, Spectrum):
        raise TypeError(f"spectrum must be a Spectrum, got {type(spectrum).__name__}")
    quantity = "R" if d.y_kind.startswith("R") else "T"
    if d.y_kind != "counts" and quantity != spectrum.quantity:
        raise ParameterError("dialect.y_kind", d.y_kind,
                             f"does not fit a spectrum of quantity {spectrum.quantity!r}")
    names = d.columns if d.columns is not None else (_X_COLUMN_NAMES[d.x_unit],
                                                     _Y_COLUMN_NAMES[d.y_kind])
    if d.metadata_style == "delimited" and (d.delimiter == " " or not names):
        raise ParameterError("dialect.metadata_style", "delimited",
                             "needs a column header line and a delimiter other than spaces")
    x = from_nm(spectrum.wavelength_nm, d.x_unit)
    y = _from_fraction(spectrum.values, d.y_kind)
    order = np.argsort(x, kind="stable")
    if d.x_order == "descending":
        order = order[::-1]
    x, y = x[order], y[order]

    out: list = []
    if d.metadata_style != "none":
        items = dict(spectrum.metadata.get("header", {}) or {})
        for k, v in spectrum.metadata.items():
            if k not in ("header", "comments", "footer", "reader", "ordinate") and \
                    isinstance(v, (str, int, float)) and not isinstance(v, bool):
                items.setdefault(str(k), v)
        items = {k: v for k, v in items.items()
                 if re.sub(r"[^a-z]", "", str(k).lower()) not in ("xunits", "yunits")}
        items["XUnits"] = _X_UNIT_WORDS[d.x_unit]
        items["YUnits"] = _Y_UNIT_WORDS[d.y_kind]
        for c in spectrum.metadata.get("comments", []) or []:
            out.append("# " + " ".join(str(c).split()))
        for k, v in items.items():
            k = " ".join(str(k).split()).replace(":", "_").replace("=", "_") or "?"
            v = " ".join(str(v).split())
            out.append({"colon": f"{k}: {v}", "equals": f"{k}={v}",
                        "comment": f"# {k}: {v}",
                        "delimited": f"{k}{d.delimiter}{v}"}[d.metadata_style])
    if names:
        # Two spaces keep names such as "T (%)" one column in a whitespace table.
        out.append(("  " if d.delimiter == " " else d.delimiter).join(names))
    if d.thousands:
        xs = _format_numbers(x, d, precision)
        ys = _format_numbers(y, d, precision)
        body = d.newline.join(a + d.delimiter + b for a, b in zip(xs, ys))
    else:                                # one pass; the decimal comma swapped in C
        q = '"' if d.decimal == d.delimiter else ""     # "500,5","81,25"
        row = f"{q}{{:.{precision}g}}{q}{d.delimiter}{q}{{:.{precision}g}}{q}".format
        body = d.newline.join(map(row, x.tolist(), y.tolist()))
        if d.decimal == ",":
            body = body.replace(".", ",")
    text = d.newline.join(out + [body]) + d.newline
    try:
        if d.encoding == "utf-16-le":
            data = codecs.BOM_UTF16_LE + text.encode("utf-16-le")
        elif d.encoding == "utf-16-be":
            data = codecs.BOM_UTF16_BE + text.encode("utf-16-be")
        elif d.encoding in ("utf-32-le", "utf-32-be"):
            bom = codecs.BOM_UTF32_LE if d.encoding == "utf-32-le" else codecs.BOM_UTF32_BE
            data = bom + text.encode(d.encoding)
        else:
            data = text.encode(d.encoding)
    except UnicodeEncodeError as exc:
        raise ParameterError("dialect.encoding", d.encoding,
                             f"cannot encode {exc.object[exc.start:exc.end]!r}; use utf-8") \
            from None
    return atomic_write_bytes(path, data)


def _main(argv=None) -> int:
    """``python -m fitting.reader FILE...``: what the reader makes of each file, and how fast."""
    import sys
    status = 0
    for name in (sys.argv[1:] if argv is None else argv):
        t0 = time.perf_counter()
        try:
            spec = read_spectrum(name)
        except SpectrumFormatError as exc:
            print(f"{exc}", file=sys.stderr)
            status = 1
            continue
        dt = time.perf_counter() - t0
        size = os.path.getsize(name) / 1e6
        d = spec.metadata["reader"]
        print(f"{name}: {len(spec)} points, {spec.wavelength_nm[0]:g}-"
              f"{spec.wavelength_nm[-1]:g} nm, {spec.quantity}; read in {dt:.3f} s "
              f"({dt / max(size, 1e-9):.3f} s/MB)")
        print("  " + Dialect(**{k: d[k] for k in d if k in _DIALECT_FIELDS}).describe())
        for w in spec.warnings:
            print("  note: " + w)
    return status


_DIALECT_FIELDS = {f.name for f in fields(Dialect)}

if __name__ == "__main__":
    raise SystemExit(_main())
