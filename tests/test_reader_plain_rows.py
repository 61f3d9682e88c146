"""The reader's bulk paths for plain rows agree with its field-by-field paths.

Sniffing judges the head of a file in one pass for the likely dialect and reads the
sampled rows of the table's width in one split (:meth:`_Numbers.plain_values`); the
head itself is cut by one ``str.split``. Each shortcut must give exactly what the
careful path gives: the same row kinds, the same sample (bit for bit, -0.0 kept) and
the same head lines. The references here are the careful paths themselves
(:func:`_row_kind`, :meth:`_Numbers.parse`, the line-by-line head cut), run on the
demo files and on heads built to be awkward. No physics values are involved.
"""

import math
import os

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import fitting.reader as reader
from fitting.reader import ReaderOptions

ROOT = os.path.join(os.path.dirname(__file__), os.pardir)


def _demo_texts():
    out = []
    for base, _, files in sorted(os.walk(os.path.join(ROOT, "demo_data"))):
        for f in sorted(files):
            if f.endswith((".csv", ".txt", ".dat")):
                with open(os.path.join(base, f), "rb") as fh:
                    out.append((f, reader._decode(fh.read(), "auto", f)[0]))
    return out


def _sample_field_by_field(lines, layout, kinds):
    """The sample of :func:`reader._layout` built the careful way: every field parsed."""
    numbers = reader._Numbers(layout.decimal)
    rows = [line for line, (k, _) in zip(lines[layout.start:], kinds[layout.start:])
            if k in (reader._DATA, reader._GAP, reader._MIXED)][:500]
    sample = np.full((len(rows), layout.n_columns), np.nan)
    for r, line in enumerate(rows):
        for c, tok in enumerate(reader._split(line.strip(), layout.delimiter)
                                [:layout.n_columns]):
            v = numbers.parse(tok)
            if v is not None:
                sample[r, c] = v
    return sample


def _check_layout(text, options=None):
    layout = reader._layout(text, options or ReaderOptions(), "<t>")
    lines, _ = reader._head_lines(text, reader._SNIFF_LINES)
    numbers = reader._Numbers(layout.decimal)
    kinds = [reader._row_kind(line, layout.delimiter, numbers) for line in lines]
    want = _sample_field_by_field(lines, layout, kinds)
    assert layout.sample.shape == want.shape
    # Bit for bit: NaN where the careful path has NaN, -0.0 stays -0.0.
    assert layout.sample.tobytes() == want.tobytes()
    return layout


def test_sample_of_every_demo_file_equals_the_field_by_field_sample():
    texts = _demo_texts()
    assert len(texts) >= 14
    for name, text in texts:
        layout = _check_layout(text)
        assert layout.sample.shape[0] > 100, name      # the bulk path had work to do


@pytest.mark.parametrize("sep,dec", [("\t", "."), (";", ","), (",", "."), (" ", "."),
                                     (" ", ","), ("\t", ","), (";", ".")])
def test_sample_of_awkward_plain_rows_is_exact(sep, dec):
    # Signs, exponents, -0, leading and trailing decimal marks, spaces around the
    # delimiter, trailing delimiters, a wider and a narrower row, a text column row.
    cells = ["-0", "+1.5e-3", ".25", "7.", "1E+22", "4.9e-324", "123456789012345678",
             "0.1", "-2.5E-310"]
    body = []
    for i in range(40):
        a, b = cells[i % len(cells)], cells[(3 * i + 1) % len(cells)]
        if dec == ",":
            a, b = a.replace(".", ","), b.replace(".", ",")
        join = {0: sep, 1: f" {sep} " if sep != " " else "  ", 2: sep}[i % 3]
        tail = sep if (sep != " " and i % 5 == 0) else ""
        body.append(f"{400 + i}{join}{a}{join if sep != ' ' else sep}{b}{tail}")
    body.insert(10, f"{sep}".join(["450", "1", "2", "3"]))          # wider row
    body.insert(20, f"460{sep}5")                                  # narrower row
    body.insert(30, f"470{sep}5{sep}PMT")                          # a word in a column
    text = "Sample: S-1\nWavelength (nm)" + sep + "T" + sep + "R\n" + "\n".join(body) + "\n"
    options = ReaderOptions(delimiter={" ": "spaces"}.get(sep, sep), decimal=dec)
    layout = _check_layout(text, options)
    assert layout.n_columns == 3


def test_plain_values_reads_exactly_what_parse_reads():
    for dec in (".", ","):
        numbers = reader._Numbers(dec)
        for sep in ("\t", ";", ",", " "):
            if sep == dec:
                continue
            pattern = numbers.row_pattern(sep)
            rows = []
            for a in ("0", "-0", "1e-5", "6.02e23", "12345.678901234567", "5e-324"):
                a = a.replace(".", dec)
                s = f"{a} {sep}\t{a}{sep}{a}" if sep != " " else f"{a}\t {a}  {a}"
                assert pattern.fullmatch(s), s
                rows.append(s)
            n = reader._plain_fields(rows[0], sep)      # the fields the sniffer counts
            toks = [t for s in rows for t in reader._split(s, sep)]
            assert len(toks) == n * len(rows)
            if "" in toks:
                # "0 \t\t0": the tab pattern takes tabs around a tab, an empty field
                # the one split cannot see; it must say so (None), not misread.
                assert sep == "\t" and numbers.plain_values(rows, sep, n) is None
                continue
            got = np.array(numbers.plain_values(rows, sep, n))
            assert got.tobytes() == np.array([numbers.parse(t) for t in toks]).tobytes()


_cells = st.one_of(
    st.floats(-1e4, 1e5, allow_nan=False).map(lambda v: f"{v:.6g}"),
    st.floats(0, 1e4, allow_nan=False).map(lambda v: f"{v:.3f}".replace(".", ",")),
    st.integers(-50, 100_000).map(str),
    st.sampled_from(["1,234.5", "1.234,5", '"500,5"', "nan", "--", "", "1e999", "PMT",
                     "T (%)", "5O", "1.2.3", "#", "-", ".5", "-0", "1E+22"]))
_seps = st.sampled_from(["\t", ";", ",", " ", "  ", ", ", " ;", "\t\t"])


@st.composite
def _heads(draw):
    sep = draw(_seps)
    width = draw(st.integers(1, 4))
    lines = [sep.join(draw(st.lists(_cells, min_size=width, max_size=width)))
             for _ in range(draw(st.integers(0, 30)))]
    for at, text in draw(st.lists(st.tuples(st.integers(0, len(lines)), st.sampled_from(
            ["", "# 1,2", "Scan: 1100-300 nm", "Wavelength (nm)\tT (%)", "[Data]",
             ";".join(["1.5"] * 300)])), max_size=5)):
        lines.insert(at, text)
    return lines


@settings(max_examples=200, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(_heads(), st.sampled_from(["\t", ";", ",", " "]), st.sampled_from([".", ","]))
def test_bulk_row_judgement_equals_row_by_row(lines, sep, dec):
    numbers = reader._Numbers(dec)
    stripped = [line.strip() for line in lines]
    maybe = [i for i, s in enumerate(stripped) if s and reader._HAS_DIGIT.search(s)
             and not reader._is_comment(s)
             and (reader._HAS_SPACE.search(s) if sep == " " else sep in s)]
    kinds: dict = {}
    reader._judge_rows(maybe, kinds, stripped, lines, sep, numbers)
    careful = reader._Numbers(dec)
    assert kinds == {i: reader._row_kind(lines[i], sep, careful) for i in maybe}
    # Only rows the plain pattern takes are remembered as plain.
    pattern = careful.row_pattern(sep)
    assert numbers.plain_lines == {i for i in maybe if pattern and pattern.fullmatch(
        stripped[i])}


@pytest.mark.parametrize("text", ["", "a", "a\n", "a\nb", "a\nb\n", "\n\n\n", "1\n2\n3\n",
                                  "1\n2\n3", "1\n2\n3\n4", "x\r\ny\r\n"])
@pytest.mark.parametrize("n", [1, 2, 3, 400])
def test_head_cut_in_one_split_equals_the_line_by_line_cut(text, n):
    # The line-by-line cut without a character limit: the reader's general path.
    assert reader._head_lines(text, n) == reader._head_lines_by_line(text, n, math.inf)


def test_tab_table_with_an_empty_field_is_sampled_field_by_field():
    # "450\t\t87.5\t1": the plain pattern takes it as a row of four fields, one of
    # them empty; the one split would see three numbers and must hand over.
    rows = [f"{400 + i}\t{50 + i % 7}.5\t{i % 3}.25\t1" for i in range(30)]
    rows[12] = "412\t\t57.5\t1"
    text = "Wavelength (nm)\tT\tR\tX\n" + "\n".join(rows) + "\n"
    layout = _check_layout(text)
    assert np.isnan(layout.sample[12, 1])
