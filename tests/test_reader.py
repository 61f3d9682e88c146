"""Tests for fitting/reader.py: dialects, encodings, units, ordinates, errors, speed path.

Reference values: hc from the exact SI constants as tabulated by scipy.constants
(CODATA 2018); lambda = 1e7 / nu (definition of the wavenumber, 1 cm = 1e7 nm);
A = -log10 T (definition of decadic absorbance, IUPAC Gold Book). Everything else
is checked against values computed by hand in the test.
"""

from __future__ import annotations

import codecs
import json
import os

import numpy as np
import pytest
import scipy.constants as sc
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fitting.errors import ParameterError, PellucidError, RecipeError, SpectrumFormatError
from fitting.reader import (
    Dialect, ReaderOptions, from_nm, parse_spectrum, preview, read_spectrum, sniff, to_nm,
    write_spectrum,
)
from fitting.spectrum import Spectrum
from fitting.units import HC_EV_NM


def smooth_spectrum(n=301, lo=300.0, hi=1100.0, quantity="T", **kw):
    wl = np.linspace(lo, hi, n)
    return Spectrum(wl, 0.55 + 0.35 * np.cos(wl / 23.0), quantity=quantity, **kw)


def table(rows, delim=";", head=""):
    return head + "\n".join(delim.join(str(v) for v in r) for r in rows) + "\n"


# --------------------------------------------------------------------- round trips

ROUND_TRIP = [
    Dialect(),
    Dialect(delimiter=";", decimal=",", encoding="latin-1", x_unit="um"),
    Dialect(delimiter=",", x_unit="cm-1", y_kind="absorbance", encoding="utf-16-le",
            metadata_style="equals"),
    Dialect(delimiter=" ", decimal=",", x_unit="eV", y_kind="T_fraction",
            encoding="utf-8-sig", metadata_style="comment", x_order="descending"),
    Dialect(delimiter="\t", thousands=",", x_unit="A", newline="\r\n", encoding="utf-16-be"),
    Dialect(delimiter=";", decimal=",", thousands=".", x_unit="A", encoding="cp1252"),
    Dialect(delimiter=",", thousands=",", x_order="descending"),          # quoted "1,234.5"
    Dialect(delimiter=" ", y_kind="T_fraction", metadata_style="none", newline="\r"),
    Dialect(delimiter=";", metadata_style="delimited", x_unit="eV"),
    Dialect(delimiter="\t", columns=(), metadata_style="colon", x_unit="um"),  # units from meta
    Dialect(delimiter="\t", decimal=",", columns=("lambda/nm", "Transmission %")),
]


@pytest.mark.parametrize("dialect", ROUND_TRIP, ids=lambda d: d.describe()[:60])
def test_round_trip_every_dialect(tmp_path, dialect):
    header = {"Sample": "F-12 (anneal 2)", "Operator": "Kim"}
    if dialect.encoding != "latin-1":
        header["Note"] = "2 h – 300 °C"              # en dash: cp1252, not Latin-1
    spec = smooth_spectrum(metadata={"header": header})
    path = write_spectrum(tmp_path / "s.txt", spec, dialect=dialect)
    back = read_spectrum(path)
    rtol = 1e-6 if dialect.thousands else 1e-8          # six decimals with thousands groups
    np.testing.assert_allclose(back.wavelength_nm, spec.wavelength_nm, rtol=rtol)
    np.testing.assert_allclose(back.values, spec.values, rtol=0, atol=1e-6)
    assert back.quantity == "T"
    assert back.warnings == ()
    got = sniff(path)
    for name in ("delimiter", "decimal", "thousands", "encoding", "newline", "x_unit",
                 "y_kind", "metadata_style", "x_order"):
        assert getattr(got, name) == getattr(dialect, name), name
    assert got.x_unit_from == ("metadata" if dialect.columns == () else "header")
    if dialect.metadata_style != "none":
        assert back.metadata["header"]["Sample"] == "F-12 (anneal 2)"
        assert back.metadata["header"]["Operator"] == "Kim"
        assert back.metadata["header"].get("Note", "") == header.get("Note", "")
    assert back.sha256 and back.source == str(path) and back.name == "s"
    json.dumps(back.metadata)                            # recipes and exports store it


@pytest.mark.parametrize("kind", ["R_fraction", "R_percent"])
def test_reflectance_round_trip(tmp_path, kind):
    spec = smooth_spectrum(quantity="R")
    back = read_spectrum(write_spectrum(tmp_path / "r.csv", spec,
                                        dialect=Dialect(delimiter=",", y_kind=kind)))
    assert back.quantity == "R"
    np.testing.assert_allclose(back.values, spec.values, atol=1e-9)


def test_writer_refuses_mislabelled_quantity_and_unencodable_text(tmp_path):
    with pytest.raises(ParameterError, match="quantity 'R'"):
        write_spectrum(tmp_path / "x.txt", smooth_spectrum(quantity="R"),
                       dialect=Dialect(y_kind="T_percent"))
    spec = smooth_spectrum(metadata={"header": {"Note": "λ/4 stack"}})
    target = tmp_path / "keep.txt"
    target.write_text("old content")
    with pytest.raises(ParameterError, match="cannot encode 'λ'"):
        write_spectrum(target, spec, dialect=Dialect(encoding="latin-1"))
    assert target.read_text() == "old content"          # nothing lost on failure
    assert sorted(p.name for p in tmp_path.iterdir()) == ["keep.txt"]  # no temp left


# --------------------------------------------------------------------- units

def test_unit_conversions_against_codata():
    # CODATA 2018 (exact SI h, c, e) via scipy.constants: hc = 1239.841984 eV nm.
    hc = sc.h * sc.c / sc.e * 1e9
    assert HC_EV_NM == pytest.approx(hc, rel=1e-8)
    wl = np.array([250.0, 500.0, 1000.0, 2500.0])
    np.testing.assert_allclose(from_nm(wl, "eV"), hc / wl, rtol=1e-8)
    np.testing.assert_allclose(from_nm(wl, "cm-1"), [40000.0, 20000.0, 10000.0, 4000.0])
    np.testing.assert_allclose(from_nm(wl, "um"), wl / 1000)
    np.testing.assert_allclose(from_nm(wl, "A"), wl * 10)
    for unit in ("nm", "um", "A", "cm-1", "eV"):
        np.testing.assert_allclose(to_nm(from_nm(wl, unit), unit), wl, rtol=1e-12)
    with pytest.raises(ParameterError):
        to_nm(wl, "furlong")


@pytest.mark.parametrize("label, unit, values", [
    ("Wavelength (nm)", "nm", [400, 500, 600, 700, 800, 900]),
    ("Wavenumber [cm-1]", "cm-1", [25000, 20000, 16000, 14000, 12000, 11000]),
    ("wavenumber (cm⁻¹)", "cm-1", [25000, 20000, 16000, 14000, 12000, 11000]),
    ("Energy/eV", "eV", [3.1, 2.5, 2.0, 1.8, 1.5, 1.3]),
    ("Photon energy", "eV", [3.1, 2.5, 2.0, 1.8, 1.5, 1.3]),
    ("λ (µm)", "um", [0.4, 0.5, 0.6, 0.7, 0.8, 0.9]),          # micro sign U+00B5
    ("lambda [μm]", "um", [0.4, 0.5, 0.6, 0.7, 0.8, 0.9]),      # Greek mu U+03BC
    ("Wavelength (\u212b)", "A", [4000, 5000, 6000, 7000, 8000, 9000]),  # Angstrom sign
    ("Wavelength (A)", "A", [4000, 5000, 6000, 7000, 8000, 9000]),
    ("wavelength in nm", "nm", [400, 500, 600, 700, 800, 900]),
])
def test_abscissa_unit_from_column_name(label, unit, values):
    wl_nm = to_nm(np.array(values, float), unit)
    text = table([(v, 50 + i) for i, v in enumerate(values)], head=f"{label};T (%)\n")
    s = parse_spectrum(text)
    np.testing.assert_allclose(s.wavelength_nm, np.sort(wl_nm))
    assert s.metadata["reader"]["x_unit"] == unit
    assert s.metadata["reader"]["x_unit_from"] == "header"


@pytest.mark.parametrize("meta, unit", [("XUnits: NANOMETERS", "nm"), ("##XUNITS=1/CM", "cm-1"),
                                        ("X units = MICROMETERS", "um"),
                                        ("Abscissa: eV", "eV")])
def test_abscissa_unit_from_metadata(meta, unit):
    # Values 4..9 would be read as µm from their range; the metadata decides.
    s = parse_spectrum(table([(v, 0.5) for v in range(4, 10)], head=meta + "\n"))
    assert s.metadata["reader"]["x_unit"] == unit
    assert s.metadata["reader"]["x_unit_from"] == "metadata"


def test_abscissa_unit_inferred_from_range_and_overridable():
    nm = parse_spectrum(table([(v, 0.5) for v in range(400, 410)]))
    assert nm.metadata["reader"]["x_unit"] == "nm" and nm.warnings == ()
    um = parse_spectrum(table([(v / 10, 0.5) for v in range(3, 12)]))
    assert um.metadata["reader"]["x_unit"] == "um"
    assert any("µm" in w and "eV" in w for w in um.warnings)     # ambiguity is said
    np.testing.assert_allclose(um.wavelength_nm, np.arange(3, 12) * 100.0)
    # A grid even in 1/E (converted from an even nm grid) is read as energy.
    ev = HC_EV_NM / np.linspace(400, 1000, 25)
    s = parse_spectrum(table([(f"{e:.8f}", 0.5) for e in ev]))
    assert s.metadata["reader"]["x_unit"] == "eV"
    np.testing.assert_allclose(s.wavelength_nm, np.linspace(400, 1000, 25), rtol=1e-7)
    wn = parse_spectrum(table([(v, 0.5) for v in range(25000, 9000, -2000)]))
    assert wn.metadata["reader"]["x_unit"] == "cm-1"
    forced = parse_spectrum(table([(v, 0.5) for v in range(25000, 9000, -2000)]),
                            options=ReaderOptions(x_unit="Å"))
    assert forced.metadata["reader"]["x_unit"] == "A"
    assert forced.metadata["reader"]["x_unit_from"] == "option"
    np.testing.assert_allclose(forced.wavelength_nm, np.arange(11000, 25001, 2000) / 10)


# --------------------------------------------------------------------- ordinate

def test_percent_fraction_and_absorbance():
    rows = [(400 + 10 * i, v) for i, v in enumerate([12.5, 40.0, 80.0, 91.0, 88.0])]
    s = parse_spectrum(table(rows))
    np.testing.assert_allclose(s.values, [0.125, 0.40, 0.80, 0.91, 0.88])
    assert s.metadata["reader"]["y_kind"] == "T_percent"
    f = parse_spectrum(table([(w, v / 100) for w, v in rows]))
    np.testing.assert_allclose(f.values, s.values)
    assert f.metadata["reader"]["y_kind"] == "T_fraction"
    # A = -log10 T (decadic absorbance, IUPAC Gold Book): A = 1 is T = 0.1.
    a = parse_spectrum(table([(400 + i, A) for i, A in enumerate([0, 0.5, 1, 2, 3])],
                             head="Wavelength (nm);Absorbance\n"))
    np.testing.assert_allclose(a.values, [1.0, 10 ** -0.5, 0.1, 0.01, 0.001])
    assert a.quantity == "T" and a.metadata["reader"]["y_kind"] == "absorbance"
    opaque = parse_spectrum(table([(400 + i, v) for i, v in enumerate([0.1, 0.12, 0.15, 0.1,
                                                                     0.11])]))
    assert any("set y_kind='T_percent'" in w for w in opaque.warnings)
    forced = parse_spectrum(table([(400 + i, v) for i, v in enumerate([0.1, 0.12, 0.15, 0.1,
                                                                     0.11])]),
                            options=ReaderOptions(y_kind="T_percent"))
    np.testing.assert_allclose(forced.values, [0.001, 0.0012, 0.0015, 0.001, 0.0011])


@pytest.mark.parametrize("name, kind, quantity", [
    ("%T", "T_percent", "T"), ("T [%]", "T_percent", "T"), ("Transmittance", None, "T"),
    ("%R", "R_percent", "R"), ("Reflectance (%)", "R_percent", "R"), ("R", None, "R"),
    ("A", "absorbance", "T"), ("OD", "absorbance", "T"), ("Abs (a.u.)", "absorbance", "T"),
])
def test_ordinate_kind_from_column_name(name, kind, quantity):
    values = [0.2, 0.4, 0.6, 0.7, 0.75] if kind != "T_percent" and kind != "R_percent" \
        else [20, 40, 60, 70, 75]
    s = parse_spectrum(table(list(zip(range(400, 405), values)),
                             head=f"Wavelength (nm);{name}\n"))
    assert s.quantity == quantity
    if kind:
        assert s.metadata["reader"]["y_kind"] == kind
        assert s.metadata["reader"]["y_kind_from"] == "header"


def test_raw_counts_need_saying_so():
    text = table([(400 + i, 20000 + 100 * i) for i in range(6)])
    with pytest.raises(SpectrumFormatError, match=r"line 6: values up to 20500.*y_kind='counts'"):
        parse_spectrum(text)
    s = parse_spectrum(text, options=ReaderOptions(y_kind="counts"))
    np.testing.assert_allclose(s.values, 20000 + 100 * np.arange(6))
    assert s.metadata["ordinate"] == "counts" and s.warnings == ()


# --------------------------------------------------------------------- dialect details

def test_decimal_comma_with_thousands_separator():
    s = parse_spectrum("Wellenlänge (nm);T (%)\n" + table(
        [("1.234,5", "87,2"), ("1.235,5", "87,4"), ("1.236,5", "87,0"), ("1.237,5", "86,9"),
         ("1.238,5", "86,1")]))
    np.testing.assert_allclose(s.wavelength_nm, [1234.5, 1235.5, 1236.5, 1237.5, 1238.5])
    np.testing.assert_allclose(s.values, [0.872, 0.874, 0.870, 0.869, 0.861])
    d = sniff("Wellenlänge (nm);T (%)\n" + table([("1.234,5", "87,2")] * 1 + [
        (f"1.2{35 + i},5", "87,2") for i in range(5)]))
    assert (d.delimiter, d.decimal, d.thousands) == (";", ",", ".")


def test_point_decimal_with_thousands_separator_in_tab_file():
    rows = [(f"1,{200 + i}.5", f"{80 + i}.25") for i in range(6)]
    s = parse_spectrum(table(rows, delim="\t"))
    np.testing.assert_allclose(s.wavelength_nm, 1200.5 + np.arange(6))
    d = sniff(table(rows, delim="\t"))
    assert (d.delimiter, d.decimal, d.thousands) == ("\t", ".", ",")


def test_semicolon_decimal_comma_plain():
    s = parse_spectrum(table([(f"{450 + i},5", f"8{i},2") for i in range(5)]))
    np.testing.assert_allclose(s.wavelength_nm, 450.5 + np.arange(5))
    np.testing.assert_allclose(s.values, (80.2 + np.arange(5)) / 100)


def test_metadata_comments_and_footer_kept():
    text = ("##TITLE=Film F-3 on glass\n# measured after anneal\nInstrument: UVN-2\n"
            "Slit=2 nm\nIntegration time;100 ms\n\nWavelength (nm);T (%)\n"
            + table([(400 + i, 50 + i) for i in range(6)]) + "\n[Peaks]\n1;403\nEnd\n")
    s = parse_spectrum(text)
    assert s.metadata["header"] == {"TITLE": "Film F-3 on glass", "Instrument": "UVN-2",
                                    "Slit": "2 nm", "Integration time": "100 ms"}
    assert s.metadata["comments"] == ["measured after anneal"]
    assert s.metadata["footer"] == ["[Peaks]", "1;403", "End"]
    assert len(s) == 6 and s.metadata["reader"]["columns"] == ["Wavelength (nm)", "T (%)"]
    assert s.metadata["reader"]["header_lines"] == 7


def test_two_header_lines_and_whitespace_header():
    s = parse_spectrum("Wavelength\tT\nnm\t%\n" + table([(400 + i, 50 + i) for i in range(5)],
                                                         delim="\t"))
    assert s.metadata["reader"]["columns"] == ["Wavelength [nm]", "T [%]"]
    assert s.metadata["reader"]["y_kind_from"] == "header"
    w = parse_spectrum("Wavelength (nm)   T (%)\n" + table([(400 + i, 50 + i) for i in range(5)],
                                                         delim="   "))
    assert w.metadata["reader"]["columns"] == ["Wavelength (nm)", "T (%)"]


def test_whitespace_metadata_is_not_taken_for_column_names():
    s = parse_spectrum("XUnits: 1/CM\nYUnits: %T\n"
                       + "\n".join(f"{20000 - 100 * i} {50 + i}" for i in range(6)))
    assert s.metadata["header"] == {"XUnits": "1/CM", "YUnits": "%T"}
    assert s.metadata["reader"]["columns"] == []
    assert s.metadata["reader"]["x_unit"] == "cm-1"
    np.testing.assert_allclose(s.wavelength_nm, 1e7 / (20000 - 100 * np.arange(6)))


def test_text_between_data_rows_is_skipped_and_named():
    # A note between rows ("Lamp change" at a lamp or detector change-over, common
    # practice in UV-Vis-NIR exports) is skipped with its line; the rows keep their values.
    text = "400;50\nx;3\n401;51\nNote;x\n402;52\n403;53\n404;54\n"
    s = parse_spectrum(text)
    np.testing.assert_allclose(s.wavelength_nm, [400, 401, 402, 403, 404])
    np.testing.assert_allclose(s.values, [0.50, 0.51, 0.52, 0.53, 0.54])
    assert any("line 2 ('x;3')" in w and "line 4 ('Note;x')" in w and "skipped" in w
               for w in s.warnings)
    assert s.metadata["reader"]["skipped_lines"] == [2, 4]
    damaged_first = "400;5O\n401;51\n402;52\n403;53\n404;54\n405;55\n"
    with pytest.raises(SpectrumFormatError, match=r"line 1: column 2 holds text.*'5O'"):
        parse_spectrum(damaged_first)


def test_stray_line_in_an_energy_export_changes_nothing():
    # A stray text line right after the first rows of an eV export, inside the lines
    # used to detect the layout: the same spectrum as without it, plus a note.
    rows = [(f"{3.1 - 0.01 * i:.4f}", f"{0.5 + 0.001 * i:.4f}") for i in range(60)]
    head = "Energy (eV)\tT\n"
    plain = parse_spectrum(head + table(rows, delim="\t"))
    for at in (1, 2, 30, 58):
        lines = table(rows, delim="\t").splitlines()
        lines.insert(at, "Lamp change")
        s = parse_spectrum(head + "\n".join(lines) + "\n")
        np.testing.assert_array_equal(s.wavelength_nm, plain.wavelength_nm)
        np.testing.assert_array_equal(s.values, plain.values)
        assert s.metadata["reader"]["x_unit"] == "eV"
        assert any(f"line {at + 2} ('Lamp change')" in w for w in s.warnings), s.warnings
        assert s.metadata["reader"]["columns"] == ["Energy (eV)", "T"]


def test_several_tables_or_much_text_among_rows_are_refused():
    rows = table([(400 + i, 50) for i in range(30)])
    with pytest.raises(SpectrumFormatError, match=r"line 32: column names again: the file "
                       r"holds more than one table"):
        parse_spectrum("Wavelength (nm);T (%)\n" + rows + "Wavelength (nm);T (%)\n" + rows)
    noisy = "".join(f"{400 + i};50\nnote {i}\n" for i in range(40))
    with pytest.raises(SpectrumFormatError, match=r"line 2: more than 20 lines of text among "
                       r"the data rows.*'note 0'"):
        parse_spectrum(noisy)


def test_column_choice_auto_and_override():
    rows = [(i, 400 + 2 * i, 0.5 + i / 100, 0.003) for i in range(8)]
    text = table(rows, head="Point;Wavelength (nm);T;sigma\n")
    s = parse_spectrum(text)                             # index column skipped
    np.testing.assert_allclose(s.wavelength_nm, 400 + 2 * np.arange(8))
    np.testing.assert_allclose(s.values, 0.5 + np.arange(8) / 100)
    bare = parse_spectrum(table(rows))                   # no names: values decide
    np.testing.assert_allclose(bare.wavelength_nm, s.wavelength_nm)
    by_name = parse_spectrum(text, options=ReaderOptions(y_column="SIGMA"))
    np.testing.assert_allclose(by_name.values, 0.003)
    by_index = parse_spectrum(text, options=ReaderOptions(x_column=1, y_column=3))
    np.testing.assert_allclose(by_index.values, 0.003)
    by_prefix = parse_spectrum(text, options=ReaderOptions(x_column="wavelength"))
    assert by_prefix.metadata["reader"]["x_column"] == 1
    # Unnamed raw-signal column before the T column: T is the one that fits 0-100 %.
    raw = parse_spectrum(table([(400 + i, 21000 + i, 55.0 + i) for i in range(6)]))
    assert raw.metadata["reader"]["y_column"] == 2
    np.testing.assert_allclose(raw.values, (55.0 + np.arange(6)) / 100)


def test_sorting_duplicates_and_dropped_rows():
    desc = parse_spectrum(table([(409 - i, 50 + i) for i in range(10)]))
    assert np.all(np.diff(desc.wavelength_nm) > 0) and desc.warnings == ()
    np.testing.assert_allclose(desc.values, (59 - np.arange(10)) / 100)
    assert desc.metadata["reader"]["x_order"] == "descending"
    rng = np.random.default_rng(3)
    perm = rng.permutation(10)
    shuffled = parse_spectrum(table([(400 + p, 0.3 + 0.01 * p) for p in perm]))
    np.testing.assert_allclose(shuffled.values, 0.3 + 0.01 * np.arange(10))
    assert any("not in order" in w for w in shuffled.warnings)
    dup = parse_spectrum(table([(400, 40), (401, 41), (401, 45), (402, 42), (403, 43),
                                (404, 44)]))
    np.testing.assert_allclose(dup.wavelength_nm, [400, 401, 402, 403, 404])
    np.testing.assert_allclose(dup.values, [0.40, 0.43, 0.42, 0.43, 0.44])
    assert any("1 repeated wavelength" in w for w in dup.warnings)
    gaps = parse_spectrum("x;y\n" + table([(400 + i, 50 + i) for i in range(6)])
                          + "406;--\n407;\n408;NaN\n;55\n409;59\n")
    np.testing.assert_allclose(gaps.wavelength_nm, [400, 401, 402, 403, 404, 405, 409])
    assert any(w.startswith("4 row(s)") and "line 8" in w for w in gaps.warnings)


def test_out_of_range_values_kept_and_flagged():
    s = parse_spectrum(table([(400, -0.4), (401, 3.0), (402, 50.0), (403, 99.0),
                              (404, 100.6), (405, 100.2)]))
    np.testing.assert_allclose(s.values, [-0.004, 0.03, 0.5, 0.99, 1.006, 1.002])
    low = [w for w in s.warnings if "below 0 %" in w]
    high = [w for w in s.warnings if "above 100 %" in w]
    assert low and "1 value(s)" in low[0] and "-0.4 %" in low[0] and "400 nm" in low[0]
    assert high and "2 value(s)" in high[0] and "100.6 %" in high[0]
    clean = parse_spectrum(table([(400 + i, 50) for i in range(5)]))
    assert clean.warnings == ()


def test_quoted_csv_and_utf16_without_bom():
    text = '"Wavelength (nm)","T (%)"\n' + "".join(f'"{400 + i}","{50 + i}.5"\n'
                                                  for i in range(5))
    s = parse_spectrum(text)
    np.testing.assert_allclose(s.values, (50.5 + np.arange(5)) / 100)
    raw = text.encode("utf-16-le")                         # no byte-order mark
    assert sniff(raw).encoding == "utf-16-le"
    np.testing.assert_allclose(parse_spectrum(raw).values, s.values)


def test_latin1_header_and_forced_encoding(tmp_path):
    p = tmp_path / "l1.txt"
    p.write_bytes("Wavelength (µm)\tT (%)\n".encode("latin-1")
                  + table([(0.4 + i / 10, 50) for i in range(5)], delim="\t").encode())
    assert sniff(p).encoding == "latin-1"
    s = read_spectrum(p)
    np.testing.assert_allclose(s.wavelength_nm, [400, 500, 600, 700, 800])
    with pytest.raises(SpectrumFormatError, match=r"l1.txt, line 1: .*read as utf-8 text"):
        read_spectrum(p, options=ReaderOptions(encoding="utf-8"))


def test_range_mask_and_sigma_options():
    text = table([(400 + i, 50 + (i % 3)) for i in range(40)])
    opts = ReaderOptions(range_nm=(405, 430), mask_windows_nm=((410, 412),), sigma=0.002,
                         name="F-1")
    s = parse_spectrum(text, options=opts)
    assert s.wavelength_nm[0] == 405 and s.wavelength_nm[-1] == 430 and s.name == "F-1"
    np.testing.assert_array_equal(s.wavelength_nm[~s.used], [410, 411, 412])
    np.testing.assert_allclose(s.sigma, 0.002)
    est = parse_spectrum(text, options=ReaderOptions(sigma="estimate"))
    assert est.sigma.shape == est.values.shape and np.all(est.sigma > 0)
    with pytest.raises(SpectrumFormatError, match="keeps only 2 points"):
        parse_spectrum(text, options=ReaderOptions(range_nm=(400, 401)))


# --------------------------------------------------------------------- options

def test_options_dict_round_trip_and_validation():
    opts = ReaderOptions(x_column="Wavelength (nm)", y_column=2, x_unit="µm", y_kind="%T",
                         delimiter="semicolon", decimal=",", encoding="Latin1",
                         range_nm=(350, 1000), mask_windows_nm=[(650, 660)], sigma="estimate")
    assert (opts.x_unit, opts.y_kind, opts.delimiter, opts.encoding) == \
        ("um", "T_percent", ";", "latin-1")
    d = json.loads(json.dumps(opts.to_dict()))
    assert ReaderOptions.from_dict(d) == opts
    assert ReaderOptions.from_dict({}) == ReaderOptions()
    with pytest.raises(RecipeError, match="'x_units'.*unknown reader option"):
        ReaderOptions.from_dict({"x_units": "nm"})
    for bad in ({"x_unit": "furlong"}, {"y_kind": "counts%"}, {"delimiter": "|"},
                {"range_nm": [900, 400]}, {"sigma": -1}, {"sigma": "guess"},
                {"mask_windows_nm": [[1, 2, 3]]}, {"x_column": -1}, {"x_column": True},
                {"x_column": 1, "y_column": 1}, {"encoding": "ebcdic"}):
        with pytest.raises(RecipeError):
            ReaderOptions.from_dict(bad)
    # Comma as decimal mark and separator is the quoted CSV of spreadsheets ("500,5").
    assert ReaderOptions.from_dict({"decimal": ",", "delimiter": ","}).decimal == ","


def test_preview_shows_lines_and_problem(tmp_path):
    good = tmp_path / "good.csv"
    good.write_text("Wavelength (nm),T (%)\n" + table([(400 + i, 50) for i in range(30)], ","))
    pv = preview(good, n_lines=5)
    assert len(pv.lines) == 5 and pv.lines[0] == "Wavelength (nm),T (%)"
    assert pv.dialect.delimiter == "," and pv.dialect.n_rows == 30 and pv.problem == ""
    assert "line 2" in pv.dialect.describe()
    bad = tmp_path / "bad.csv"
    bad.write_text("only\none\ncolumn\n1\n2\n")
    pv = preview(bad)
    assert pv.dialect is None and "bad.csv" in pv.problem and pv.lines[0] == "only"


# --------------------------------------------------------------------- broken input

BROKEN = [
    ("empty", b"", r"line 1: the file is empty"),
    ("blank", b"  \n\n \n", r"line 1: the file is empty"),
    ("control", b"400;50\n401;51\n402\x01;52\n", r"line 3: this is a binary or damaged"),
    ("one column", b"Wavelength\n400\n401\n402\n403\n404\n405\n",
     r"line 2: only one column of numbers"),
    # "450,5" per line is one column of decimal-comma numbers, not "450" and "5"
    ("decimal-comma column", b"T (%)\n87,05\n87,2\n86,95\n87,4\n87,1\n",
     r"line 2: only one column of numbers.*export both columns"),
    ("decimal-comma column, no header", b"12,5\n13,5\n12,75\n13,25\n12,5\n",
     r"line 1: only one column of numbers"),
    ("text only", b"hello\nworld\n", r"line 1: no rows of two or more numbers"),
    # Columns are counted from 1, as a spreadsheet user counts them (the second is the value).
    ("text in data", b"x;y\n400;50\n401;51\n402;52\n403;5O\n404;54\n405;55\n",
     r"line 5: column 2 \('y'\) holds text.*found '5O'"),
    ("too few", b"x;y\n400;50\n401;51\n402;52\n", r"line 2: only 3 data rows"),
    ("four points", b"400;50\n401;51\n402;52\n403;53\n\n", r"line 1: only 4 usable data points"),
    ("nonpositive x", b"0;50\n401;51\n402;52\n403;53\n404;54\n", r"line 1: the abscissa must"),
    ("odd utf-16", codecs.BOM_UTF16_LE + "400;50\n".encode("utf-16-le") + b"4",
     r"line 2: the file cannot be read as utf-16-le text"),
    ("jcamp compressed", b"##TITLE=x\n##XYDATA=(X++(Y..Y))\n400 1 2 3\n404 1 2 3\n"
     b"408 1 2 3\n412 1 2 3\n416 1 2 3\n", r"line 2: compressed JCAMP-DX"),
]


@pytest.mark.parametrize("name, content, message", BROKEN, ids=[b[0] for b in BROKEN])
def test_broken_input_names_file_and_line(tmp_path, name, content, message):
    path = tmp_path / "broken.txt"
    path.write_bytes(content)
    with pytest.raises(SpectrumFormatError, match=message) as info:
        read_spectrum(path)
    assert str(info.value).startswith(f"{path}, line ")
    assert info.value.line is not None and isinstance(info.value, PellucidError)


# Whole-file problems: no line to point at, but what the file is and what to do.
NOT_TEXT = [
    ("png", b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR" + bytes(range(256)),
     r"this is a PNG image, not a text table; export the spectrum as a text table"),
    ("xlsx", b"PK\x03\x04\x14\x00\x06\x00" + bytes(200),
     r"Excel workbook \(\.xlsx\).*save the sheet as CSV"),
    ("pdf", b"%PDF-1.4\n%\xe2\xe3\xcf\xd3\n1 0 obj\n", r"this is a PDF document"),
    ("instrument binary", b"SPC1" + bytes(range(256)) * 4,
     r"this is a binary file \(perhaps the instrument's own format\).*export the spectrum "
     r"from the instrument software as a text table"),
]


@pytest.mark.parametrize("name, content, message", NOT_TEXT, ids=[b[0] for b in NOT_TEXT])
def test_files_that_are_not_text_say_what_they_are(tmp_path, name, content, message):
    path = tmp_path / "export.csv"
    path.write_bytes(content)
    with pytest.raises(SpectrumFormatError, match=message) as info:
        read_spectrum(path)
    assert str(info.value).startswith(f"{path}: ") and info.value.line is None


def test_decimal_comma_pairs_that_are_a_real_table_still_read():
    # Bare integers "wavelength,percent" with a rising first column and no leading-zero
    # digits after the comma are a two-column table (common practice in old exports).
    s = parse_spectrum("".join(f"{400 + 5 * i},{50 + i % 7}\n" for i in range(20)))
    np.testing.assert_allclose(s.wavelength_nm[:3], [400, 405, 410])
    np.testing.assert_allclose(s.values[:3], [0.50, 0.51, 0.52])


def test_utf32_with_byte_order_mark_reads(tmp_path):
    text = "Wellenlänge (nm);T (%)\n" + table([(400 + i, 50 + i) for i in range(8)])
    for enc, bom in (("utf-32-le", codecs.BOM_UTF32_LE), ("utf-32-be", codecs.BOM_UTF32_BE)):
        p = tmp_path / f"{enc}.txt"
        p.write_bytes(bom + text.encode(enc))
        s = read_spectrum(p)
        assert sniff(p).encoding == enc
        np.testing.assert_allclose(s.values[:2], [0.50, 0.51])


def test_unknown_encoding_says_so(tmp_path):
    # EBCDIC (code page 500) is none of the encodings the reader tries.
    p = tmp_path / "mainframe.txt"
    p.write_bytes(("Wavelength (nm);T (%)\n" + table([(400 + i, 50) for i in range(8)]))
                  .encode("cp500"))
    with pytest.raises(SpectrumFormatError, match=r"mainframe.txt, line 1: .*character "
                       r"encoding Pellucid does not know.*save or export it again as UTF-8"):
        read_spectrum(p)


def test_forced_transmittance_refuses_a_reflectance_column():
    text = "Wavelength (nm);R (%)\n" + table([(400 + i, 12) for i in range(8)])
    with pytest.raises(SpectrumFormatError, match=r"line 1: column 2 \('R \(%\)'\) holds "
                       r"reflectance R, but the reader is set to read transmittance T"):
        parse_spectrum(text, options=ReaderOptions(y_kind="T_percent"))
    assert parse_spectrum(text).quantity == "R"       # auto: read as what it says
    assert parse_spectrum(text, options=ReaderOptions(y_kind="R_percent")).quantity == "R"


def test_missing_file_and_bad_columns(tmp_path):
    with pytest.raises(SpectrumFormatError, match="cannot read the file"):
        read_spectrum(tmp_path / "nope.csv")
    text = table([(400 + i, 50) for i in range(6)], head="wl;T\n")
    with pytest.raises(SpectrumFormatError, match=r"line 1: no single x column.*'wl', 'T'"):
        parse_spectrum(text, options=ReaderOptions(x_column="lambda"))
    with pytest.raises(SpectrumFormatError, match=r"line 1: y column 5 does not exist"):
        parse_spectrum(text, options=ReaderOptions(y_column=5))
    with pytest.raises(SpectrumFormatError, match="has no column names"):
        parse_spectrum(table([(400 + i, 50) for i in range(6)]),
                       options=ReaderOptions(x_column="wl"))


# --------------------------------------------------------------------- big file

def test_twenty_megabyte_file(tmp_path):
    n = 800_000
    wl = np.linspace(190.0, 3300.0, n)
    spec = Spectrum(wl, 0.5 + 0.4 * np.cos(wl / 37.0))
    path = write_spectrum(tmp_path / "big.csv", spec,
                          dialect=Dialect(delimiter=";", decimal=",", metadata_style="colon"))
    assert os.path.getsize(path) > 18e6
    back = read_spectrum(path)
    assert len(back) == n
    np.testing.assert_allclose(back.wavelength_nm, wl, rtol=1e-9)
    np.testing.assert_allclose(back.values, spec.values, atol=1e-9)
    assert back.metadata["reader"]["data_lines"] == [4, n + 3]   # XUnits, YUnits, names


def test_big_file_with_a_bad_row_reports_its_line(tmp_path):
    rows = [f"{400 + i / 100:.2f}\t{50 + (i % 7)}" for i in range(50_000)]
    rows[31_234] = "712.34\tERR"
    path = tmp_path / "bad.tsv"
    path.write_text("\n".join(rows) + "\n")
    with pytest.raises(SpectrumFormatError, match=r"line 31235: column 2 holds text.*'ERR'"):
        read_spectrum(path)


# --------------------------------------------------------------------- properties

def _rows_text(rows, delim, comma):
    out = []
    for a, b in rows:
        line = f"{a}{delim}{b}"
        out.append(line.replace(".", ",") if comma else line)
    return "\n".join(out)


numbers = st.one_of(st.floats(allow_nan=True, allow_infinity=True, width=32),
                    st.integers(-10, 100_000), st.sampled_from(["--", "", "nan", "x", "1,2"]))
tables = st.builds(_rows_text, st.lists(st.tuples(numbers, numbers), max_size=40),
                   st.sampled_from([",", ";", "\t", " ", "  "]), st.booleans())


@st.composite
def plausible_files(draw):
    """Spectrum-like tables in random dialects, now and then with a damaged line."""
    delim = draw(st.sampled_from([",", ";", "\t", " "]))
    comma = delim != "," and draw(st.booleans())
    n = draw(st.integers(0, 30))
    wl = draw(st.lists(st.floats(0.5, 30000, allow_nan=False), min_size=n, max_size=n))
    y = draw(st.lists(st.floats(-1, 101, allow_nan=False), min_size=n, max_size=n))
    lines = [f"{a:.6g}{delim}{b:.5g}" for a, b in zip(wl, y)]
    if comma:
        lines = [line.replace(".", ",") for line in lines]
    junk = draw(st.lists(st.tuples(st.integers(0, max(n, 1)),
                                   st.sampled_from(["", "#c", "Key: v", "x;y", "--;--", "1;a",
                                                    "[End]", "\ufeffA", "nm;%"])),
                         max_size=3))
    for at, text in junk:
        lines.insert(at, text)
    head = draw(st.sampled_from(["", "Wavelength (nm);T (%)\n", "Energy/eV\tA\n",
                                 "XUnits: 1/CM\n"]))
    return head + "\n".join(lines)


any_input = st.one_of(st.binary(max_size=300), st.text(max_size=300), tables,
                      st.builds(lambda head, body: head + "\n" + body,
                                st.text(max_size=80), tables), plausible_files())


@settings(max_examples=200, deadline=2000, suppress_health_check=[HealthCheck.too_slow])
@given(any_input, st.sampled_from([ReaderOptions(), ReaderOptions(sigma="estimate"),
                                   ReaderOptions(y_kind="absorbance", x_unit="eV"),
                                   ReaderOptions(y_kind="counts", decimal=",")]))
def test_any_input_parses_or_raises_format_error(content, options):
    try:
        s = parse_spectrum(content, options=options)
    except SpectrumFormatError as exc:
        assert exc.line is None or exc.line >= 1
        return
    assert len(s) >= 5 and np.all(np.diff(s.wavelength_nm) > 0)
    assert np.all(np.isfinite(s.values)) and np.all(s.wavelength_nm > 0)


def test_command_line_summary(tmp_path, capsys):
    from fitting.reader import _main
    good = write_spectrum(tmp_path / "good.txt", smooth_spectrum())
    (tmp_path / "bad.txt").write_text("nothing here\n")
    assert _main([str(good), str(tmp_path / "bad.txt")]) == 1
    out, err = capsys.readouterr()
    assert "301 points, 300-1100 nm, T; read in" in out and "from the column name" in out
    assert "bad.txt, line 1: no rows of two or more numbers" in err


# --------------------------------------------------------------------- damaged exports

DEMO = os.path.join(os.path.dirname(__file__), os.pardir, "demo_data")


def _demo_text(*parts):
    with open(os.path.join(DEMO, *parts), encoding="utf-8-sig") as fh:
        return fh.read()


def test_damaged_rows_before_a_good_run_are_named_not_a_crash():
    # 295 rows with '·' for the decimal point, then good rows, plus "-nan" and
    # "100000000000": the first damaged row is named (this once raised ValueError).
    lines = _demo_text("references", "PL2-T-0115_raw_counts.txt").split("\n")
    for i in range(5, 300):
        lines[i] = lines[i].replace(".", "·")
    lines[7] = "-nan\t100000000000"
    for options in (ReaderOptions(), ReaderOptions(y_kind="counts")):
        with pytest.raises(SpectrumFormatError, match=r"line 6: column 2 \('Counts'\) holds "
                           r"text.*found '313·1445395'"):
            parse_spectrum("\n".join(lines), options=options)
    every = _demo_text("references", "PL2-T-0115_raw_counts.txt").replace(".", "·")
    with pytest.raises(SpectrumFormatError, match=r"line 6: rows of numbers were found, but "
                       r"their numbers hold characters.*'313·1445395'"):
        parse_spectrum(every)


def test_infinite_energy_is_dropped_not_read_as_zero_nm():
    # hc / inf = 0 nm: an "inf" in an eV column must not become a wavelength of 0.
    rows = [(f"{3.0 - 0.1 * i:.2f}", 0.5) for i in range(8)] + [("inf", 0.5), ("1e999", 0.6)]
    s = parse_spectrum(table(rows, delim="\t", head="Energy (eV)\tT\n"))
    assert len(s) == 8 and s.wavelength_nm.min() > 0
    assert any(w.startswith("2 row(s)") and "line 10, 11" in w for w in s.warnings)
    tiny = table([(5e-324, 0.5)] + [(4000 + 100 * i, 0.5) for i in range(6)],
                 head="Wavelength (A);T\n")
    with pytest.raises(SpectrumFormatError, match=r"line 2: the abscissa value 4.94066e-324 A "
                       r"is no usable wavelength"):
        parse_spectrum(tiny)


def test_values_are_finite_after_conversion_and_averaging():
    # Absorbance -400 is T = 1e400 (overflow): dropped with its line, never kept as inf.
    rows = [(400 + i, 0.5) for i in range(6)] + [(406, -400)]
    s = parse_spectrum(table(rows, head="Wavelength (nm);Absorbance\n"))
    assert len(s) == 6 and np.all(np.isfinite(s.values))
    assert any("line 8" in w and "dropped" in w for w in s.warnings)
    # Two counts near the largest double at one wavelength: their mean, not inf.
    big = table([(400, 1.5e308), (400, 1.7e308)] + [(401 + i, 1e3) for i in range(5)])
    c = parse_spectrum(big, options=ReaderOptions(y_kind="counts"))
    assert c.values[0] == pytest.approx(1.6e308) and np.all(np.isfinite(c.values))
    # Their noise estimate is finite too (the estimate scales with the values), or the
    # file is refused by name when even that overflows.
    huge = table([(400 + i, (1e306, 3e306)[i % 2]) for i in range(12)])
    h = parse_spectrum(huge, options=ReaderOptions(y_kind="counts", sigma="estimate"))
    small = parse_spectrum(huge.replace("e+306", "e+06"),
                           options=ReaderOptions(y_kind="counts", sigma="estimate"))
    np.testing.assert_allclose(h.sigma, small.sigma * 1e300, rtol=1e-9)
    swing = table([(400 + i, (1.7e308, -1.7e308)[i % 2]) for i in range(12)])
    with pytest.raises(SpectrumFormatError, match="too large to estimate their noise"):
        parse_spectrum(swing, options=ReaderOptions(y_kind="counts", sigma="estimate"))


def test_cut_short_last_row_is_dropped_with_a_note():
    rows = "Wavelength (nm),T (%)\n" + "".join(f"{540 + i},81.49\n" for i in range(11))
    s = parse_spectrum(rows + "551,8")                   # no line break: cut while saving
    assert s.wavelength_nm[-1] == 550 and len(s) == 11
    assert any("line 13, '551,8'" in w and "cut off" in w for w in s.warnings)
    for cut in ("551,", "551", "551,81.4"):
        assert parse_spectrum(rows + cut).wavelength_nm[-1] == 550, cut
    whole = parse_spectrum(rows + "551,81.52")           # complete, no line break: kept
    assert whole.wavelength_nm[-1] == 551 and whole.warnings == ()
    ended = parse_spectrum(rows + "551,8\n")             # a line break: a real 8 %
    assert ended.values[-1] == pytest.approx(0.08)


def test_text_column_is_ignored_and_said():
    det = ["PMT"] * 10 + ["InGaAs"] * 10
    rows = [(400 + 5 * i, f"{50 + 0.25 * i:.2f}", d) for i, d in enumerate(det)]
    text = table(rows, head="Wavelength (nm);T (%);Detector\n")
    s = parse_spectrum(text)
    np.testing.assert_allclose(s.wavelength_nm, 400 + 5 * np.arange(20))
    np.testing.assert_allclose(s.values, (50 + 0.25 * np.arange(20)) / 100)
    assert any("column 3 ('Detector') holds text ('PMT', 'InGaAs') and was not read" in w
               for w in s.warnings)
    d = sniff(text)
    assert d.text_columns == (2,) and "column 3 'Detector' holds text" in d.describe()
    named = parse_spectrum(text, options=ReaderOptions(x_column="wavelength", y_column="T (%)"))
    np.testing.assert_array_equal(named.values, s.values)
    with pytest.raises(SpectrumFormatError, match=r"line 2: the y column, column 3 "
                       r"\('Detector'\), holds text.*'PMT, InGaAs'"):
        parse_spectrum(text, options=ReaderOptions(y_column="Detector"))
    first = table([(d, 400 + 5 * i, 50 + i % 3) for i, d in enumerate(det)], delim="\t")
    f = parse_spectrum(first)                            # the text column in front
    np.testing.assert_allclose(f.wavelength_nm[:2], [400, 405])
    assert f.metadata["reader"]["x_column"] == 1 and f.metadata["reader"]["text_columns"] == [0]


def test_preview_states_the_text_column(tmp_path):
    p = tmp_path / "det.csv"
    p.write_text(table([(400 + i, 50, "PMT") for i in range(8)], head="nm;T (%);Detector\n"))
    pv = preview(p)
    assert pv.problem == "" and pv.dialect.text_columns == (2,)
    assert any("'Detector'" in n and "not read" in n for n in pv.notes)


def test_quoted_decimal_comma_csv():
    # Spreadsheets with a decimal-comma locale quote numbers when the separator is ','.
    rows = [(f'"{500 + i / 2:.1f}"'.replace(".", ","), f'"{81 + i / 4:.2f}"'.replace(".", ","))
            for i in range(10)]
    s = parse_spectrum(table(rows, delim=",", head='"Wavelength (nm)","T (%)"\n'))
    np.testing.assert_allclose(s.wavelength_nm, 500 + np.arange(10) / 2)
    np.testing.assert_allclose(s.values, (81 + np.arange(10) / 4) / 100)
    d = sniff(table(rows, delim=","))
    assert (d.delimiter, d.decimal) == (",", ",") and "in quotes" in d.describe()
    # Integers are left unquoted by the same programs.
    mixed = table([(500 + i, f'"{81 + i / 4:.2f}"'.replace(".", ",")) for i in range(10)],
                  delim=",")
    np.testing.assert_allclose(parse_spectrum(mixed).values, s.values)
    forced = ReaderOptions(delimiter=",", decimal=",")
    np.testing.assert_allclose(parse_spectrum(mixed, options=forced).values, s.values)
    with pytest.raises(SpectrumFormatError, match=r"line 1: .*only works with quoted numbers"):
        parse_spectrum(table([(500 + i, 81) for i in range(6)], delim=","), options=forced)


def test_quoted_decimal_comma_round_trip(tmp_path):
    spec = smooth_spectrum()
    path = write_spectrum(tmp_path / "q.csv", spec, dialect=Dialect(delimiter=",", decimal=","))
    assert '\n"302,6666667","84,0234034"\n' in path.read_text(encoding="utf-8")
    back = read_spectrum(path)
    np.testing.assert_allclose(back.values, spec.values, atol=1e-9)
    assert (sniff(path).delimiter, sniff(path).decimal) == (",", ",")


def test_rows_above_the_table_cut_off_by_text_are_mentioned():
    text = "400;50\nWavelength (nm);T (%)\n" + table([(401 + i, 51 + i) for i in range(6)])
    s = parse_spectrum(text)
    assert s.wavelength_nm[0] == 401
    assert any("line 1 ('400;50')" in w and "not read" in w for w in s.warnings)


# --------------------------------------------------------------------- bounded work

def _count_calls(monkeypatch, module, name):
    calls = []
    real = getattr(module, name)

    def counting(*args, **kw):
        calls.append(1)
        return real(*args, **kw)
    monkeypatch.setattr(module, name, counting)
    return calls


def test_non_spectrum_text_is_refused_from_a_bounded_head(monkeypatch):
    # 15 MB of prose (with the odd number): only the head is inspected, the rest never.
    import fitting.reader as reader
    line = "the lamp warms up for 20 minutes before the scan of sample 12 starts\n"
    text = line * (15_000_000 // len(line))
    rows = _count_calls(monkeypatch, reader, "_row_kind")
    with pytest.raises(SpectrumFormatError, match=r"line 1: no rows of two or more numbers "
                       r"were found in the first [\d,]+ lines .*the rest of the file was not "
                       r"read"):
        parse_spectrum(text)
    n_lines = text.count("\n")
    head = min(reader._MAX_HEAD_LINES, reader._MAX_HEAD_CHARS // len(line) + 1)
    candidates = len(reader.DELIMITERS) * len(reader.DECIMALS)
    # Each head line is judged once per candidate dialect and per growth step (x8).
    assert len(rows) <= candidates * head * 8 / 7 + 2 * candidates * 400
    assert len(rows) < n_lines                 # fewer than one look per line of the file
    assert n_lines > 200_000


def test_long_header_still_found():
    head = "".join(f"Setting {i}: value {i}\n" for i in range(1500))
    s = parse_spectrum(head + "Wavelength (nm);T (%)\n" + table([(400 + i, 50) for i in
                                                                range(10)]))
    assert len(s) == 10 and s.metadata["reader"]["header_lines"] == 1501


def test_too_many_columns_refused_without_parsing_every_cell(monkeypatch):
    import fitting.reader as reader
    extra = "\t0.5" * 500
    rows = "".join(f"{400 + i / 2}\t{50 + i % 7}{extra}\n" for i in range(1500))
    parsed = _count_calls(monkeypatch, reader._Numbers, "parse")
    with pytest.raises(SpectrumFormatError, match=r"line 2: the table has 502 columns, more "
                       r"than the 256 Pellucid reads; export only the wavelength column"):
        parse_spectrum("Wavelength (nm)\tT (%)\n" + rows)
    assert len(rows) > 3_000_000
    assert len(parsed) < 10_000                # of 750,000 cells


# --------------------------------------------------------------------- material tables

def test_nk_table_with_decimal_commas(tmp_path):
    from fitting.dispersion import Tabulated
    p = tmp_path / "film.nk"
    p.write_text("Wellenlänge (nm);n;k\n400;2,10;0,01\n500;2,05;0,005\n600;2,00;0\n",
                 encoding="latin-1")
    t = Tabulated.from_file(p)
    np.testing.assert_allclose(t.N([400.0, 500.0]), [2.10 + 0.01j, 2.05 + 0.005j])
    bare = tmp_path / "bare.txt"                         # no header: wavelength, n, κ
    bare.write_text("400;2,10;0,01\n500;2,05;0,005\n")
    np.testing.assert_allclose(Tabulated.from_file(bare).N([400.0]), [2.10 + 0.01j])
    neg = tmp_path / "neg.nk"
    neg.write_text("nm;n;k\n400;2,10;0,01\n500;2,05;-0,005\n")
    with pytest.raises(SpectrumFormatError, match=r"neg.nk, line 3: κ must not be negative"):
        Tabulated.from_file(neg)
    text = tmp_path / "text.nk"
    text.write_text("400;2,10;0,01\n500;2,O5;0,005\n")
    with pytest.raises(SpectrumFormatError, match=r"text.nk, line 2: column 2 holds text.*"
                       r"'2,O5'"):
        Tabulated.from_file(text)


def test_nk_table_units_and_named_columns(tmp_path):
    from fitting.dispersion import Tabulated
    um = tmp_path / "um.csv"                             # µm named in the header
    um.write_text("Wavelength (µm),n,k\n0.4,2.1,0.01\n0.5,2.05,0\n0.6,2.0,0\n")
    np.testing.assert_allclose(Tabulated.from_file(um).valid_nm, (400, 600))
    bare = tmp_path / "bare.csv"                         # 0.4-0.6 with no unit: refused
    bare.write_text("0.4,2.1,0.01\n0.5,2.05,0\n0.6,2.0,0\n")
    with pytest.raises(SpectrumFormatError, match=r"bare.csv, line 1: wavelengths 0.4-0.6 with "
                       r"no unit look like µm"):
        Tabulated.from_file(bare)
    # Columns found by name, as in Pellucid's own n, κ export (σ columns between).
    export = tmp_path / "F1_nk_film.csv"
    export.write_text("# spectrum: F1\nwavelength_nm,n,n_sigma,k,k_sigma\n"
                      "400.0,2.1,0.01,0.02,nan\n500.0,2.0,0.01,0.01,nan\n")
    np.testing.assert_allclose(Tabulated.from_file(export).N([400.0]), [2.1 + 0.02j])


def test_text_lines_in_a_long_table_take_the_fast_path_with_the_same_answer():
    # One note among many rows must not send them all line by line; both paths agree.
    import fitting.reader as reader
    rows = [f"{400 + i / 100:.2f}\t{50 + i % 7}" for i in range(3000)]
    rows[1500:1500] = ["Lamp change"]
    rows[2500] = "nan\t55"                               # a missing value, not a note
    text = "Wavelength (nm)\tT (%)\n" + "\n".join(rows) + "\n"
    layout = reader._layout(text, ReaderOptions(), "<t>")
    block = reader._data_block(text, layout)[0]
    fast = reader._parse_fast_around_text(block, layout, (0, 1), 2)
    slow = reader._parse_slow(block, layout, (0, 1), 2, "<t>")
    assert fast is not None and fast.stray == slow.stray == [(1502, "Lamp change")]
    np.testing.assert_array_equal(fast.line_no, slow.line_no)
    np.testing.assert_array_equal(fast.table, slow.table)
    s = parse_spectrum(text)
    assert len(s) == 2999 and s.metadata["reader"]["skipped_lines"] == [1502]


# ------------------------------------------------- dialect search: bounded == full

def _shipped_tables(tmp_path):
    """(name, text) of every table shipped with the project: demo spectra and references,
    the validation data, and one file of each round-trip dialect."""
    import fitting.reader as reader
    root = os.path.join(os.path.dirname(__file__), os.pardir)
    out = []
    for folder in ("demo_data", os.path.join("validation", "data")):
        for base, _, files in sorted(os.walk(os.path.join(root, folder))):
            for f in sorted(files):
                if f.endswith((".csv", ".txt", ".dat")):
                    with open(os.path.join(base, f), "rb") as fh:
                        out.append((f, reader._decode(fh.read(), "auto", f)[0]))
    spec = smooth_spectrum(metadata={"header": {"Sample": "F-12", "Scan": "1100-300 nm, 1"}})
    for i, d in enumerate(ROUND_TRIP):
        path = write_spectrum(tmp_path / f"d{i}.txt", spec, dialect=d)
        out.append((path.name, reader._decode(path.read_bytes(), "auto", path)[0]))
    return out


def _same_choice(lines, options):
    import fitting.reader as reader
    fast = reader._choose_dialect_bounded(lines, options)
    full = reader._choose_dialect_full(lines, options)
    assert (fast is None) == (full is None)
    if full is not None:
        assert fast[:3] == full[:3]          # delimiter, decimal mark and every row's kind
        assert fast[3].decimal == full[3].decimal
    return full


SEARCH_OPTIONS = [ReaderOptions(), ReaderOptions(decimal=","), ReaderOptions(decimal="."),
                  ReaderOptions(delimiter=";"), ReaderOptions(delimiter=" ")]


def test_bounded_dialect_search_agrees_with_the_full_search_on_every_shipped_table(tmp_path):
    # The bounded search is exact by construction (an upper bound on each candidate's
    # key); here on the files users meet first, in every option setting.
    import fitting.reader as reader
    tables = _shipped_tables(tmp_path)
    assert len(tables) >= 30
    for name, text in tables:
        for n in (reader._SNIFF_LINES, 12):
            lines, _ = reader._head_lines(text, n)
            for options in SEARCH_OPTIONS:
                _same_choice(lines, options)
        assert _same_choice(reader._head_lines(text, reader._SNIFF_LINES)[0],
                            ReaderOptions()) is not None, name


_cells = st.one_of(
    st.floats(-1e4, 1e5, allow_nan=False).map(lambda v: f"{v:.6g}"),
    st.floats(0, 1e4, allow_nan=False).map(lambda v: f"{v:.3f}".replace(".", ",")),
    st.integers(-50, 100_000).map(str),
    st.sampled_from(["1,234.5", "1.234,5", '"500,5"', '"81.2"', "nan", "--", "", "1e999",
                     "PMT", "InGaAs", "T (%)", "nm", "5O", "1.2.3", "#", "x", "-", ".5"]))
_separators = st.sampled_from(["\t", ";", ",", " ", "  ", ", ", "; ", " ;", "\t\t"])


@st.composite
def _heads(draw):
    """The head of a table in any dialect, with headers, comments and damaged lines."""
    sep = draw(_separators)
    width = draw(st.integers(1, 4))
    lines = [sep.join(draw(st.lists(_cells, min_size=width, max_size=width)))
             for _ in range(draw(st.integers(0, 25)))]
    if draw(st.integers(0, 9)) == 0:            # rows wider than the reader takes
        lines += [draw(_separators).join(["1.5"] * 300)] * draw(st.integers(1, 30))
    for at, text in draw(st.lists(st.tuples(
            st.integers(0, len(lines)),
            st.one_of(st.sampled_from(["", "# 1,2", "Scan: 1100-300 nm, 1 nm", "Slit;2",
                                       "Wavelength (nm)\tT (%)", "% 450 87", "[Data]"]),
                      st.builds(lambda s, cs: s.join(cs), _separators,
                                st.lists(_cells, min_size=1, max_size=5)))), max_size=6)):
        lines.insert(at, text)
    return lines


@settings(max_examples=300, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(_heads(), st.sampled_from(SEARCH_OPTIONS))
def test_bounded_dialect_search_agrees_with_the_full_search_on_any_head(lines, options):
    _same_choice(lines, options)


def test_common_file_has_each_line_judged_about_once_and_a_refusal_searches_in_full(
        monkeypatch):
    import fitting.reader as reader
    lines = ["Sample: F-12", "Scan: 1100-300 nm, 1 nm steps", "Wavelength (nm)\tT (%)"]
    lines += [f"{300 + i}\t{50 + i % 9}.25" for i in range(600)]
    rows = _count_calls(monkeypatch, reader, "_row_kind")
    full = _count_calls(monkeypatch, reader, "_choose_dialect_full")
    s = parse_spectrum("\n".join(lines) + "\n")
    assert len(s) == 600 and s.metadata["reader"]["delimiter"] == "\t"
    # 400 head lines: the winner judges each once; the six other candidates a few each
    # (the full search judged all 400 under all seven).
    assert not full and len(rows) < 1.1 * reader._SNIFF_LINES
    # No candidate finds rows: the full search runs and gives its specific reasons.
    with pytest.raises(SpectrumFormatError, match="only one column of numbers"):
        parse_spectrum("Wavelength\n" + "\n".join(f"{400 + i}.5" for i in range(20)))
    assert len(full) == 1
    with pytest.raises(SpectrumFormatError, match=r"line 2: rows of numbers were found, but "
                       r"their numbers hold characters"):
        parse_spectrum("x\n" + "\n".join(f"{400 + i}\t8·{i}" for i in range(20)))
    assert len(full) == 2


@settings(max_examples=300, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(_heads(), st.sampled_from(["\t", ";", ",", " "]), st.sampled_from([".", ","]))
def test_plain_rows_by_one_expression_are_judged_as_field_by_field(lines, delim, dec):
    import fitting.reader as reader
    numbers = reader._Numbers(dec)
    for line in lines + [" 450.5 ;\t87.2;; ", "1e5,2E-3", "+.5\t-7.", "450\u00a087"]:
        assert reader._row_kind(line, delim, numbers) == \
            reader._row_kind_exact(line, delim, reader._Numbers(dec)), repr(line)
