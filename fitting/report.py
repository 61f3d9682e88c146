"""The batch report: one multi-page PDF a process engineer can read without Pellucid.

Pages, in order (A4 portrait):

1. **Overview**: provenance (software, recipe name and hash, date), counts (and
   how many fits the engine judged good, to check or poor), the thickness
   statistics and the first rows of the summary table (with each fit's verdict);
   the table goes on over as many pages as needed.
2. **Thickness**: the thickness over the batch order and its histogram, with the
   specification limits drawn.
3. **Optical constants**: n and κ of all successful spectra overlaid (evenly
   subsampled for big batches), read from each spectrum's exported files.
4. **Failed spectra** (only if any): each with the reason it failed.
5. **Fits that did not converge** (only failures that still exported their curves,
   e.g. status ``"failed"`` from the batch runner), then the **fits to look at**:
   the successful fits with verdict ``poor``, then ``check``, then the highest
   reduced χ². ``worst`` of each at most, two per page, each redrawn from its
   exported curves with its reason, verdict reasons or warnings.

The text pages (overview, table, failures) are set in the PDF's standard fonts
(Helvetica and Courier: every PDF reader has them, so nothing is embedded), each
table row one line of Courier; a page whose text those fonts cannot encode (a Greek
or Cyrillic file name, say) is set in DejaVu like the plot pages. Together with
fixed page layouts this keeps the report of thousands of spectra to a second or two.

Summary rows
------------
``rows`` are the batch summary rows, plain dicts in batch order. Every key is
optional; missing or unreadable values are shown as "–".

==========================  =============================================================
``file``                    input spectrum (path or name)
``sha256``                  SHA-256 of the input file (the table shows its first 10 digits)
``status``                  ``"ok"`` (or ``"warning"``, ``"converged"``) for a finished fit,
                            which the table shows as "fitted"; anything else
                            (``"failed"``, ``"error"``, ``"skipped"``) is a failure, shown
                            as stored
``verdict``                 the fit engine's own judgement of a finished fit: ``"good"``,
                            ``"check"`` or ``"poor"`` (empty: none given)
``verdict_reasons``         why, in plain words (``"; "``-separated text or a list)
``reason``                  why it failed, in words (shown for failures)
``film_thickness``          fitted thickness in nm (or another ``{layer}_thickness`` key)
``film_thickness_sigma``    its 1σ in nm
``n_633``                   n of that film at 633 nm (``film_n@633`` is accepted too)
``redchi``                  reduced χ²
``warnings``                number of warnings, or the list of warning texts
``spec_pass``               True/False or ``"pass"``/``"fail"``/``"n/a"``; computed from
                            ``spec`` when missing
``result_dir``              folder with that spectrum's exports (absolute, or relative to
                            ``results_dir``); default ``results_dir / <file stem>``
==========================  =============================================================

The per-spectrum files are those of :func:`fitting.export.export_result`
(``*_nk_<layer>.csv`` and ``*_curves.csv``, or ``*_result.json`` as a fallback).
"""

from __future__ import annotations

import contextlib
import io
import itertools
import json
import math
import os
import textwrap
from datetime import UTC, datetime
from pathlib import Path
from collections.abc import Callable, Mapping, Sequence

import matplotlib as mpl
import numpy as np
from matplotlib.artist import Artist
from matplotlib.backends.backend_pdf import PdfPages
from matplotlib.cbook import is_math_text
from matplotlib.collections import PolyCollection
from matplotlib.figure import Figure
from matplotlib.font_manager import FontProperties
from matplotlib.lines import Line2D
from matplotlib.text import Text

from . import __version__
from .atomic import atomic_write_bytes
from .export import provenance_footer, read_curves_csv, read_nk_csv
from .labels import format_pm
from .limits import Limit, overall_state
from .plots import (PALETTE, fit_figure, nk_overlay_figure, row_ok, row_thickness_key,
                    spec_bounds, thickness_histogram_figure, thickness_trend_figure)

__all__ = ["write_batch_report", "A4_INCHES", "VERDICTS"]

#: Verdicts of the fit engine, best first; the report colours and ranks by them.
VERDICTS = ("good", "check", "poor")
A4_INCHES = (8.27, 11.69)
ROWS_FIRST_PAGE = 36      # table rows under the overview block (fewer with many limits)
ROWS_PER_PAGE = 52        # table rows on continuation pages
FAILED_PER_PAGE = 16      # each with up to three lines of reason
MAX_OVERLAY = 60          # n/κ curves drawn at most (evenly subsampled)
_MONO = "DejaVu Sans Mono"


# -- reading rows ---------------------------------------------------------------------
def _num(x) -> float:
    try:
        return float(x)
    except (TypeError, ValueError):
        return math.nan


def _fmt(x, spec="{:.4g}") -> str:
    v = _num(x)
    return spec.format(v) if math.isfinite(v) else "–"


def _n633(row, layer: str = "film") -> float:
    for key in ("n_633", f"{layer}_n@633", "n633"):
        if row.get(key) is not None:
            return _num(row[key])
    return math.nan


def _pm(value, sigma) -> str:
    """Thickness as "231.0 ± 0.06": one decimal, σ to two significant digits."""
    return format_pm(value, sigma, sigma_fmt=".2g")


def _warn_texts(row) -> list[str]:
    w = row.get("warnings")
    if isinstance(w, (list, tuple)):
        return [str(x) for x in w]
    if isinstance(w, str) and not math.isfinite(_num(w)):   # texts, not a count
        return [p.strip() for p in w.split(";") if p.strip()]
    return []


def _verdict(row) -> str:
    v = str(row.get("verdict") or "").strip().lower()
    return v if v in VERDICTS else ""


def _verdict_texts(row) -> list[str]:
    v = row.get("verdict_reasons")
    if isinstance(v, (list, tuple)):
        return [str(x) for x in v if str(x).strip()]
    return [p.strip() for p in str(v or "").split(";") if p.strip()]


def _warn_count(row) -> int:
    w = row.get("warnings")
    if w is None or w == "":
        return 0
    if isinstance(w, (list, tuple)):
        return len(w)
    if isinstance(w, str):
        try:
            return int(w)
        except ValueError:
            return len([p for p in w.split(";") if p.strip()])
    v = _num(w)
    return int(v) if math.isfinite(v) else 0


def _spec_state(row, spec, key) -> str | None:
    """"pass", "fail" or None (no spec / not applicable)."""
    v = row.get("spec_pass")
    if isinstance(v, (bool, np.bool_)):
        return "pass" if v else "fail"
    if isinstance(v, str) and v.strip().lower() in ("pass", "fail", "n/a"):
        return {"n/a": None}.get(v.strip().lower(), v.strip().lower())
    if not spec or not row_ok(row):
        return None
    states = []
    for q, lim in spec.items():
        x = _num(row.get(q))
        if not math.isfinite(x) and q.endswith("_n@633"):
            x = _n633(row, q[: -len("_n@633")])
        states.append(Limit.coerce(lim).check(x))
    state = overall_state(states)         # a quantity the fit did not give cannot pass
    return None if state == "n/a" else state


def _short(text, width) -> str:
    text = str(text)
    if len(text) <= width:
        return text
    keep = width - 1
    return text[: keep // 2] + "…" + text[len(text) - (keep - keep // 2):]


def _clip(text, width) -> str:
    """Cut prose at the end (a sentence reads from its start)."""
    text = " ".join(str(text).split())
    return text if len(text) <= width else text[: width - 1] + "…"


def _reason(row) -> str:
    """Why a row failed, without the file name it usually starts with: the report
    names the file beside it, and the space goes to what to do about it."""
    reason = " ".join(str(row.get("reason") or row.get("message")
                          or "no reason recorded").split())
    f = str(row.get("file") or "")
    for prefix in dict.fromkeys((f, Path(f).name, Path(f).stem)):
        if prefix and reason.startswith(prefix) and reason[len(prefix):len(prefix) + 1] in ",:":
            rest = reason[len(prefix) + 1:].strip()
            if rest:
                return rest
    return reason


def _input_folder(rows) -> str:
    """The folder all input files share ("" if they do not, or there is one file)."""
    files = [str(r["file"]) for r in rows if r.get("file")]
    if len(files) < 2:
        return ""
    try:
        common = os.path.commonpath(files)
    except ValueError:      # mixed absolute/relative paths or drives
        return ""
    return "" if common in files else common


def _display_name(row, info) -> str:
    f = str(row.get("file") or "–")
    folder = info.get("input_folder")
    if folder and f.startswith(folder):
        return f[len(folder):].lstrip("/\\") or f
    return f


def _result_dir(row, results_dir: Path) -> Path:
    d = row.get("result_dir")
    if d:
        p = Path(d)
        return p if p.is_absolute() else results_dir / p
    return results_dir / Path(str(row.get("file", ""))).stem


def _layer_of(key: str) -> str:
    return key[: -len("_thickness")] if key.endswith("_thickness") else ""


def _load_nk(folder: Path, layer: str):
    files = sorted(folder.glob("*_nk_*.csv"))
    if files:
        pick = [f for f in files if f.stem.endswith(f"_nk_{layer}")] or files
        return read_nk_csv(pick[0])
    for f in sorted(folder.glob("*_result.json")):
        doc = json.loads(f.read_text(encoding="utf-8"))
        optical = doc.get("optical") or {}
        if optical:
            oc = optical.get(layer) or next(iter(optical.values()))
            return {"name": (doc.get("spectrum") or {}).get("name", folder.name),
                    "wavelength_nm": oc["wavelength_nm"], "n": oc["n"], "k": oc["k"]}
    return None


def _load_curves(folder: Path):
    files = sorted(folder.glob("*_curves.csv"))
    if files:
        return read_curves_csv(files[0])
    for f in sorted(folder.glob("*_result.json")):
        doc = json.loads(f.read_text(encoding="utf-8"))
        c = doc.get("curves")
        if c:
            return {**c, "name": (doc.get("spectrum") or {}).get("name", folder.name),
                    "quantity": doc.get("quantity", "T"), "redchi": doc.get("redchi")}
    return None


# -- recipe and provenance ------------------------------------------------------------
def _recipe_info(recipe, provenance: Mapping) -> tuple[str, str]:
    name = provenance.get("recipe_name") or ""
    rhash = provenance.get("recipe_hash") or ""
    if recipe is not None:
        if isinstance(recipe, Mapping):
            name = recipe.get("name", name) or name
            rhash = recipe.get("hash", rhash) or rhash
        else:
            name = getattr(recipe, "name", name) or name
            h = getattr(recipe, "hash", None)
            rhash = (h() if callable(h) else h) or rhash
    return str(name), str(rhash)


def _recipe_limits(recipe):
    if recipe is None:
        return None
    lim = recipe.get("limits") if isinstance(recipe, Mapping) else getattr(recipe, "limits", None)
    return dict(lim) if lim else None


# -- page drawing ---------------------------------------------------------------------
def _page(constrained: bool) -> Figure:
    """An A4 page; ``constrained`` for pages of plots, plain for text and tables."""
    if not constrained:
        return Figure(figsize=A4_INCHES)
    fig = Figure(figsize=A4_INCHES, layout="constrained")
    # Keep a strip free for the footer; subfigure layouts respect the rect.
    fig.get_layout_engine().set(rect=(0.02, 0.03, 0.96, 0.96))
    return fig


def _panels(fig, title, ratios):
    """A page heading and sub-figures below it, heights in ``ratios``."""
    head, *subs = fig.subfigures(len(ratios) + 1, 1,
                                 height_ratios=(0.05 * sum(ratios), *ratios))
    head.text(0.04, 0.5, title, fontsize=14, weight="bold", va="center")
    return subs


def _plot_panels(fig, title, ratios):
    """A page heading and sub-figures below it, heights in ``ratios`` (a strip is
    kept free at the bottom for the footer)."""
    head, *subs, _foot = fig.subfigures(len(ratios) + 2, 1, height_ratios=(
        0.065 * sum(ratios), *(0.905 * r for r in ratios), 0.03 * sum(ratios)))
    head.text(0.06, 0.5, title, fontsize=14, weight="bold", va="center")
    return subs


@contextlib.contextmanager
def _margins(sub, *, top=0.45, bottom=0.55, left=0.9, right=0.25, hspace=0.1):
    """Lay out the axes that a plot function makes in ``sub`` with fixed margins (inches):
    room for tick and axis labels at the left and below, a title or legend above.

    Constrained layout found these places by measuring every label again on every
    page. The plot functions clear the sub-figure first, which resets its subplot
    parameters from the rcParams, so the margins go in as rcParams during the call.
    """
    width, height = sub.bbox.width / sub.dpi, sub.bbox.height / sub.dpi
    with mpl.rc_context({"figure.subplot.left": left / width,
                         "figure.subplot.right": 1 - right / width,
                         "figure.subplot.bottom": bottom / height,
                         "figure.subplot.top": 1 - top / height,
                         "figure.subplot.hspace": hspace}):
        yield sub


def _core_fonts(fig) -> bool:
    """Make a text page ready for the PDF's standard fonts; False if it cannot be.

    Text pages (overview, summary table, failures) are written in the standard PDF
    fonts Helvetica and Courier, which every PDF reader has: nothing is embedded and a
    line of text is one PDF operation. With an embedded font matplotlib lays out and
    embeds glyph by glyph, which for a table of thousands of rows took tens of seconds.
    Their encoding (Windows-1252) has no Greek, Cyrillic or Asian letters, so a page
    that needs one stays in DejaVu like the plot pages (mathematical text, and the χ of
    the table header, are DejaVu anyway).
    """
    # Not fig.findobj: it would make every axis's ticks just to look at them.
    texts = list(fig.texts)
    rows = [a for a in fig.artists if isinstance(a, _RowText)]
    for ax in fig.axes:
        texts += ax.texts
    # (Mathematical text keeps its weight: mathtext finds no "medium" DejaVu.)
    props = [t.get_fontproperties() for t in texts if not is_math_text(t.get_text())]
    for artist in texts + rows:
        for text in artist.texts if isinstance(artist, _RowText) else [artist.get_text()]:
            try:
                text.encode("cp1252")
            except UnicodeEncodeError:
                if not is_math_text(text):
                    return False
        if isinstance(artist, _RowText):
            props.append(artist.prop)
    for prop in props:     # their regular weight is "medium": "normal" finds it, warning
        if prop.get_weight() in ("normal", 400):
            prop.set_weight("medium")
    return True


def _save_pages(pdf, pages, footer):
    """Draw and save ``pages``, a list of (kind, draw), kind "text" or "plots"."""
    for n, (kind, draw) in enumerate(pages, start=1):
        fig = Figure(figsize=A4_INCHES)
        draw(fig)
        _footer(fig, footer, n, len(pages))
        with mpl.rc_context({"pdf.use14corefonts": kind == "text" and _core_fonts(fig)}):
            pdf.savefig(fig)


def _footer(fig, text, page, pages):
    fig.text(0.04, 0.015, text, fontsize=6.5, color="#888888", ha="left")
    fig.text(0.96, 0.015, f"page {page} of {pages}", fontsize=7, color="#666666", ha="right")


#: The summary table's fields: header, width in characters, alignment, the gap after.
#: A row is one line of a monospaced font, so the fields line up by character count.
_FIELDS = (("#", 5, "right", 2), ("file", 34, "left", 2), ("sha256", 10, "left", 2),
           ("status", 7, "left", 2), ("verdict", 7, "left", 2),
           ("thickness (nm)", 17, "right", 3), ("n(633)", 7, "right", 3),
           ("χ²_red", 8, "right", 3), ("spec", 4, "right", 3),
           ("warn.", 5, "right", 0))
_OFFSETS = tuple(itertools.accumulate((w + gap for _n, w, _a, gap in _FIELDS), initial=0))
TABLE_FONTSIZE = 7.0
TABLE_WIDTH = 0.9           # figure fraction, from x = 0.05
_CHAR = 0.6 * TABLE_FONTSIZE / (TABLE_WIDTH * A4_INCHES[0] * 72)   # one character, table units
_VERDICT_COLOURS = {"check": PALETTE["spec"], "poor": PALETTE["fail"]}
_INK = "#222222"
ROW_HEIGHT = 0.0165   # figure fraction (about 0.19 in on A4)


def _status_text(row) -> str:
    """The status as the table shows it: "fitted" for every finished fit (as the app
    says; how good the fit is, is the verdict's column), the stored word otherwise."""
    return "fitted" if row_ok(row) else str(row.get("status") or "failed")


def _table_cells(i, row, key, spec, info):
    ok = row_ok(row)
    d, s = _num(row.get(key)), _num(row.get(f"{key}_sigma"))
    thick = _pm(d, s)
    state = _spec_state(row, spec, key)
    sha = str(row.get("sha256") or row.get("input_sha256") or "")[:10] or "–"
    cells = [str(i + 1), _display_name(row, info), sha, _status_text(row)]
    if ok:
        cells += [_verdict(row) or "–", thick, _fmt(_n633(row, _layer_of(key)), "{:.4f}"),
                  _fmt(row.get("redchi"), "{:.3g}"),
                  {"pass": "pass", "fail": "FAIL"}.get(state, "–"), str(_warn_count(row))]
    else:   # a failure has no numbers; its reason goes where they would be
        cells += [""] * 6
    cells = [_short(c, w) for c, (_n, w, _a, _g) in zip(cells, _FIELDS)]
    return cells, ok, state


def _table_line(cells, colours):
    """The row as one line, cells in ``_INK`` only, and the other cells as
    (character offset, text, colour) to draw over the blanks left for them."""
    line, over = [], []
    for text, colour, (_n, width, align, gap), off in zip(cells, colours, _FIELDS, _OFFSETS):
        field = text.rjust(width) if align == "right" else text.ljust(width)
        if colour != _INK and text.strip():
            over.append((off + len(field) - len(field.lstrip()), text, colour))
            field = " " * width
        line.append(field + " " * gap)
    return "".join(line).rstrip(), over


class _RowText(Artist):
    """Strings drawn by one artist: items (x, y, characters, text, colour), each at
    figure position (x, y) moved right by that many characters of the font, with
    (x, y) the left end of its baseline.

    A Text artist per table cell costs a layout and a draw call of its own; in a batch
    of thousands of spectra those cells were most of the report's time.
    """

    def __init__(self, fig, items, *, size=TABLE_FONTSIZE, family=None, style="normal",
                 weight="normal"):
        super().__init__()
        self.set_zorder(3)          # above the row shading, as Text is
        self.set_transform(fig.transFigure)
        self.items = list(items)
        self.prop = FontProperties(family=family, size=size, style=style, weight=weight)

    @property
    def texts(self):
        return [it[3] for it in self.items]

    def draw(self, renderer):
        if not self.get_visible() or not self.items:
            return
        gc = renderer.new_gc()
        xy = self.get_transform().transform([(it[0], it[1]) for it in self.items])
        if renderer.flipy():
            xy[:, 1] = renderer.get_canvas_width_height()[1] - xy[:, 1]
        char = 0.0
        if any(it[2] for it in self.items):
            char = renderer.get_text_width_height_descent("0" * 20, self.prop, False)[0] / 20
        for (x, y), (_x, _y, chars, text, colour) in zip(xy, self.items):
            gc.set_foreground(colour)
            renderer.draw_text(gc, x + chars * char, y, text, self.prop, 0.0, ismath=False)
        gc.restore()
        self.stale = False


class _EmbeddedText(Text):
    """Text in the embedded DejaVu font, even on a page of core fonts: for the few
    characters those lack (the χ of the table header)."""

    def draw(self, renderer):
        with mpl.rc_context({"pdf.use14corefonts": False}):
            super().draw(renderer)


def _draw_table(fig, top, rows, start, key, spec, info):
    """Rows of the summary table, from ``top`` (figure fraction) down.

    Each row is one line of monospaced text, so a page of the table is a few dozen
    strings, not a Text per cell; colour marks what needs a look: a failure's status
    and reason, a verdict check or poor, a spec FAIL. Drawn straight on the page (an
    Axes per page costs more than its rows).
    """
    left = 0.05

    def x_of(chars):
        return left + chars * _CHAR * TABLE_WIDTH

    def y_of(j):       # row j's centre; the header is row -1
        return top - (j + 1.5) * ROW_HEIGHT

    # Baselines 0.35 em below the row centres: capitals and digits sit in the middle.
    drop = 0.35 * TABLE_FONTSIZE / 72 / A4_INCHES[1]
    # The header in the rows' font, bold, but for χ², which the core fonts lack.
    names = [("" if name == "χ²_red" else name) for name, *_ in _FIELDS]
    header = _table_line(names, [_INK] * len(names))[0]
    fig.add_artist(_RowText(fig, [(left, y_of(-1) - drop, 0, header, _INK)],
                            family="monospace", weight="bold"))
    chi = [name for name, *_ in _FIELDS].index("χ²_red")
    fig.add_artist(_EmbeddedText(x_of(_OFFSETS[chi] + _FIELDS[chi][1]), y_of(-1), "χ²_red",
                                 ha="right", va="center", fontsize=7, weight="bold",
                                 transform=fig.transFigure))
    fig.add_artist(Line2D([left, left + TABLE_WIDTH], [top - ROW_HEIGHT] * 2,
                          transform=fig.transFigure, color="#444444", lw=0.6))
    shading = [[(left, y_of(j) - h), (left + TABLE_WIDTH, y_of(j) - h),
                (left + TABLE_WIDTH, y_of(j) + h), (left, y_of(j) + h)]
               for j in range(1, len(rows), 2) for h in [ROW_HEIGHT / 2]]
    fig.add_artist(PolyCollection(shading, facecolors="#f2f2f2", linewidths=0,
                                  transform=fig.transFigure))
    items, reasons = [], []
    for j, row in enumerate(rows):
        cells, ok, state = _table_cells(start + j, row, key, spec, info)
        y = y_of(j) - drop
        colours = [_INK] * len(cells)
        if not ok:
            colours[3] = PALETTE["fail"]
            reasons.append((x_of(_OFFSETS[4]), y, 0, _clip(_reason(row), 70), PALETTE["fail"]))
        colours[4] = _VERDICT_COLOURS.get(cells[4], _INK)
        if state == "fail":
            colours[8] = PALETTE["fail"]
        line, over = _table_line(cells, colours)
        items.append((left, y, 0, line, _INK))
        items += [(left, y, chars, text, colour) for chars, text, colour in over]
    fig.add_artist(_RowText(fig, items, family="monospace"))
    if reasons:
        fig.add_artist(_RowText(fig, reasons, size=6.5, style="italic"))


_LINE = 0.018                # overview lines, figure fraction
_PROVENANCE_LINES = 7
TABLE_BOTTOM = 0.035         # the lowest row's bottom edge: clear of the footer


def _overview_bottom(n_summary: int) -> float:
    """Where the overview block ends (figure fraction) with ``n_summary`` summary lines."""
    return 0.925 - _PROVENANCE_LINES * _LINE - 0.012 - n_summary * _LINE - 0.01


def _rows_first_page(n_summary: int) -> int:
    """Table rows that fit under the overview (fewer when there are many limits)."""
    room = int((_overview_bottom(n_summary) - TABLE_BOTTOM) / ROW_HEIGHT) - 1
    return max(0, min(ROWS_FIRST_PAGE, room))


def _overview(fig, summary, info):
    fig.text(0.06, 0.955, "Pellucid batch report", fontsize=17, weight="bold")
    lines = [("software", info["software"]), ("recipe", info["recipe_name"] or "–"),
             ("recipe hash", info["recipe_hash"] or "–"), ("created", info["created"]),
             ("input folder", _short(info["input_folder"], 80) or "–"),
             ("results folder", _short(info["results_dir"], 80)),
             ("input hashes", "first 10 hex digits of each file's SHA-256 below; "
                              "full values in the batch summary and each result")]
    ys = [0.925 - j * _LINE for j in range(_PROVENANCE_LINES)]
    ys += [ys[-1] - 0.012 - (j + 1) * _LINE for j in range(len(summary))]
    for y, (k, v) in zip(ys, lines + summary):
        fig.text(0.06, y, k, fontsize=8.5, color="#555555")
        fig.text(0.22, y, v, fontsize=8.5)
    return _overview_bottom(len(summary))


def _overview_summary(rows, key, spec) -> list[tuple[str, str]]:
    """The overview's counts, verdicts, spec result, thickness statistics and limits."""
    ok = [r for r in rows if row_ok(r)]
    d = np.array([_num(r.get(key)) for r in ok])
    d = d[np.isfinite(d)]
    states = [_spec_state(r, spec, key) for r in rows]
    n_pass = states.count("pass")
    verdicts = [_verdict(r) for r in ok]
    n_failed = len(rows) - len(ok)
    summary = [("spectra", f"{len(rows)}"),
               ("fitted", f"{len(ok)}" + ("   (status “fitted” in the table; its verdict says "
                                          "how good the fit is)" if ok else "")),
               ("failed", f"{n_failed}" + ("   (in red in the table, with the reason)"
                                           if n_failed else "")),
               ("verdicts", ", ".join(f"{verdicts.count(v)} {v}" for v in VERDICTS)
                + (f", {verdicts.count('')} without" if verdicts.count("") else "")
                if any(verdicts) else "none given by the fit engine"),
               ("in spec", f"{n_pass} of {n_pass + states.count('fail')}"
                if spec or any(s for s in states) else "no limits given")]
    if d.size:
        std = d.std(ddof=1) if d.size > 1 else 0.0
        summary.append((key.replace("_", " "),
                        f"mean {d.mean():.1f} nm, std {std:.3g} nm,"
                        f" range {d.min():.1f}–{d.max():.1f} nm"))
    for q in (spec or {}):
        lo, hi = spec_bounds(spec, q)
        summary.append((f"limit {q}", f"{'–' if lo is None else f'{lo:g}'} to "
                                      f"{'–' if hi is None else f'{hi:g}'}"))
    return summary


def _failed_page(fig, items, info):
    fig.text(0.06, 0.955, "Failed spectra", fontsize=14, weight="bold")
    h = 0.87 / (FAILED_PER_PAGE + 0.5)      # straight on the page: no Axes to pay for
    for j, (i, row) in enumerate(items):
        y = 0.93 - (j + 0.2) * h
        fig.text(0.06, y, f"{i + 1}", fontsize=7.5, ha="left", va="center", color="#555555")
        fig.text(0.113, y, _short(_display_name(row, info), 60), fontsize=7.5, va="center")
        # The whole reason, wrapped: its end usually says what to do.
        lines = textwrap.wrap(f"{row.get('status', 'failed')}: {_reason(row)}", 115)
        if len(lines) > 3:
            lines = lines[:2] + [_clip(" ".join(lines[2:]), 115)]
        fig.text(0.113, y - 0.2 * h, "\n".join(lines), fontsize=6.8, va="top",
                 color=PALETTE["fail"], linespacing=1.25)


def _has_curves(folder: Path) -> bool:
    return any(folder.glob("*_curves.csv")) or any(folder.glob("*_result.json"))


def _two_lines(text: str) -> str:
    """At most two lines of about 90 characters (what fits the page width)."""
    lines = textwrap.wrap(text, 90)
    if len(lines) > 2:
        lines = [lines[0], _clip(" ".join(lines[1:]), 90)]
    return "\n".join(lines)


def _worst_page(fig, items, results_dir, key, info, heading):
    subs = _plot_panels(fig, heading, (5,) * len(items) + ((5,) if len(items) == 1 else ()))
    for sub, (i, row) in zip(subs, items):
        d, s = _num(row.get(key)), _num(row.get(f"{key}_sigma"))
        title = (f"#{i + 1}  {_short(_display_name(row, info), 50)}   d = {_pm(d, s)} nm   "
                 rf"$\chi^2_\mathrm{{red}}$ = {_fmt(row.get('redchi'), '{:.3g}')}")
        texts = _warn_texts(row)
        nw = _warn_count(row)
        reasons = _verdict_texts(row)
        if not row_ok(row):
            title += "\n" + _two_lines(f"{row.get('status', 'failed')}: {_reason(row)}")
        elif _verdict(row) in ("check", "poor") and reasons:
            sentences = [t if t[-1] in ".!?" else t + "." for t in reasons]
            title += "\n" + _two_lines(f"verdict {_verdict(row)}: " + " ".join(sentences))
        elif texts:
            sentences = [t if t[-1] in ".!?" else t + "." for t in texts]
            title += "\n" + _two_lines("warnings: " + " ".join(sentences))
        elif nw:
            title += f"   ({nw} warning{'s' if nw > 1 else ''})"
        curves = None
        try:
            curves = _load_curves(_result_dir(row, results_dir))
        except (OSError, ValueError, KeyError):
            curves = None
        if curves is None:
            sub.text(0.5, 0.5, f"{title}\nno exported curves found in "
                               f"{_short(_result_dir(row, results_dir), 70)}",
                     ha="center", va="center", fontsize=8, color="#666666")
            continue
        with _margins(sub, top=0.1 + 0.19 * (title.count("\n") + 1), hspace=0.08):
            fit_figure(curves, fig=sub, title=title)


# -- public entry point ---------------------------------------------------------------
def write_batch_report(rows: Sequence[Mapping], results_dir, pdf_path, *, recipe=None,
                       provenance: Mapping | None = None, spec: Mapping | None = None,
                       worst: int = 6) -> Path:
    """Write the batch report PDF (atomically) and return its path.

    Parameters
    ----------
    rows : sequence of dict
        Batch summary rows in batch order; keys in the module docstring (all optional).
    results_dir : path
        Folder holding each spectrum's exports (see ``result_dir`` in the rows).
    pdf_path : path
        The PDF to write; an existing file is replaced only once the new one is complete.
    recipe : Recipe or dict, optional
        Supplies the recipe name, hash and (when ``spec`` is None) the limits.
    provenance : dict, optional
        ``software``, ``recipe_name``, ``recipe_hash``, ``created`` as made by
        :func:`fitting.export.make_provenance`; the recipe fills what is missing.
    spec : dict, optional
        Specification limits by row key, e.g. ``{"film_thickness": {"min": 475,
        "max": 525}}`` (``{"target", "tol"}`` and recipe ``Limit`` objects work too).
    worst : int
        How many of the worst successful fits (and, separately, of the failures
        with exported curves) get a fit plot.

    Returns
    -------
    Path
    """
    rows = [dict(r) for r in rows]
    results_dir = Path(results_dir)
    pdf_path = Path(pdf_path)
    prov = dict(provenance or {})
    rname, rhash = _recipe_info(recipe, prov)
    if spec is None:
        spec = _recipe_limits(recipe)
    created = prov.get("created") or datetime.now(UTC).isoformat(timespec="seconds")
    info = {"software": prov.get("software") or f"pellucid {__version__}",
            "recipe_name": rname, "recipe_hash": rhash, "created": created,
            "results_dir": str(results_dir), "input_folder": _input_folder(rows)}
    footer = provenance_footer({**prov, "software": info["software"], "recipe_hash": rhash,
                                "created": created, "input_sha256": None})
    key = row_thickness_key(rows)
    layer = _layer_of(key)

    # Plan the pages first so each can say "page i of N".
    pages: list[tuple[str, Callable[[Figure], None]]] = []   # ("text" or "plots", draw)

    summary = _overview_summary(rows, key, spec)
    first = _rows_first_page(len(summary))

    def overview(fig, chunk=rows[:first]):
        top = _overview(fig, summary, info)
        if chunk:
            _draw_table(fig, top, chunk, 0, key, spec, info)
    pages.append(("text", overview))
    for start in range(first, len(rows), ROWS_PER_PAGE):
        chunk = rows[start:start + ROWS_PER_PAGE]

        def table(fig, chunk=chunk, start=start):
            fig.text(0.06, 0.955, f"Summary table, spectra {start + 1}–{start + len(chunk)}",
                     fontsize=12, weight="bold")
            _draw_table(fig, 0.935, chunk, start, key, spec, info)
        pages.append(("text", table))

    def thickness(fig):
        top, bottom = _plot_panels(fig, "Thickness", (1, 1))
        with _margins(top):
            thickness_trend_figure(rows, spec, key=key, fig=top)
        with _margins(bottom):
            thickness_histogram_figure(rows, spec, key=key, fig=bottom)
    pages.append(("plots", thickness))

    ok_idx = [i for i, r in enumerate(rows) if row_ok(r)]
    overlay_idx = ok_idx
    if len(overlay_idx) > MAX_OVERLAY:
        pick = np.unique(np.linspace(0, len(ok_idx) - 1, MAX_OVERLAY).round().astype(int))
        overlay_idx = [ok_idx[j] for j in pick]

    def overlay(fig):
        curves, missing = [], 0
        for i in overlay_idx:
            try:
                c = _load_nk(_result_dir(rows[i], results_dir), layer)
            except (OSError, ValueError, KeyError):
                c = None
            if c is None:
                missing += 1
            else:
                curves.append({**c, "order": i + 1})
        top, bottom = _plot_panels(fig, "Optical constants", (5, 1))
        title = f"n and κ of {len(ok_idx)} successful spectra"
        if len(curves) < len(ok_idx):
            title += f" ({len(curves)} shown"
            title += ", evenly spaced in batch order)" if len(overlay_idx) < len(ok_idx) else ")"
        with _margins(top, top=0.5):
            nk_overlay_figure(curves, max_curves=MAX_OVERLAY, fig=top, title=title)
        if missing:
            bottom.text(0.06, 0.7, f"{missing} of the selected spectra had no readable n/κ "
                                   f"export in {_short(results_dir, 60)}.", fontsize=8,
                        color="#666666")
    pages.append(("plots", overlay))

    failed = [(i, r) for i, r in enumerate(rows) if not row_ok(r)]
    for start in range(0, len(failed), FAILED_PER_PAGE):
        pages.append(("text", lambda fig, items=failed[start:start + FAILED_PER_PAGE]:
                      _failed_page(fig, items, info)))

    # Fits that ran but did not converge still have curves worth seeing; they come
    # first, then the finished fits with the highest reduced χ².
    n_worst = max(int(worst), 0)
    unconverged = list(itertools.islice(
        (i for i, r in failed if _has_curves(_result_dir(r, results_dir))), n_worst))
    def badness(i):
        # Poor, then check, then the rest; within each, the highest reduced χ² first.
        chi = _num(rows[i].get("redchi"))
        return (-{"poor": 2, "check": 1}.get(_verdict(rows[i]), 0),
                -chi if math.isfinite(chi) else math.inf)
    ranked = sorted(ok_idx, key=badness)[:n_worst]
    any_verdict = any(_verdict(rows[i]) for i in ok_idx)
    worst_heading = ("Fits to look at (verdict poor, then check, then highest reduced χ²)"
                     if any_verdict else "Worst fits (highest reduced χ²)")
    for group, heading in ((unconverged, "Fits that did not converge"),
                           (ranked, worst_heading)):
        for start in range(0, len(group), 2):
            items = [(i, rows[i]) for i in group[start:start + 2]]
            pages.append(("plots", lambda fig, items=items, heading=heading:
                          _worst_page(fig, items, results_dir, key, info, heading)))

    meta = {"Title": f"Pellucid batch report{': ' + rname if rname else ''}",
            "Creator": info["software"],
            "Subject": f"recipe_hash={rhash}; created={created}; spectra={len(rows)}"}
    buf = io.BytesIO()
    with PdfPages(buf, metadata=meta) as pdf:
        _save_pages(pdf, pages, footer)
    return atomic_write_bytes(pdf_path, buf.getvalue())


# -- the report of one fit ------------------------------------------------------------
_FIT_PARAM_ROWS = 34       # parameter rows on the first page; more continue on page 2


def _param_cells(p) -> tuple[str, str, str, str]:
    value = f"{p.value:.6g}"
    if p.expr:
        sd = f"= {p.expr}"
    elif not p.vary:
        sd = "fixed"
    elif p.stderr is not None and math.isfinite(p.stderr):
        sd = f"{p.stderr:.3g}"
    else:
        sd = "not estimated"
    if p.at_bound:
        sd += "  AT BOUND"
    return p.name, value, sd, p.unit


def _fit_text_page(fig, result, info, provenance, params):
    """Headline, statistics, warnings, provenance and the parameter table."""
    fig.text(0.06, 0.955, "Pellucid fit report", fontsize=17, weight="bold")
    name = (result.spectrum or {}).get("name") or info["input_file"] or "spectrum"
    fig.text(0.06, 0.93, _short(str(name), 80), fontsize=10, color="#333333")
    try:
        d, sd = result.thickness()
        head = f"thickness {_pm(_num(d), _num(sd))} nm"
        layer_name = next((k[: -len("_thickness")] for k in result.params
                           if k.endswith("_thickness")), "film")
        head += f"   ({layer_name}, ± 1σ)"
    except KeyError:
        head = "no film layer"
    fig.text(0.06, 0.895, head, fontsize=15, weight="bold")
    status = "converged" if result.success else "did NOT converge"
    if result.aborted:
        status = "stopped before it finished"
    verdict = getattr(result, "verdict", None)
    y = 0.865
    if verdict:
        reasons = "; ".join(getattr(result, "verdict_reasons", ()) or ())
        fig.text(0.06, y, _clip(f"verdict: {verdict}" + (f" ({reasons})" if reasons else ""),
                                110), fontsize=9, weight="bold")
        y -= 0.02
    why = "" if result.message.strip().lower() == status else f": {_clip(result.message, 90)}"
    stats = [("fit", f"{status}{why}"),
             ("goodness", f"χ² = {result.chisqr:.4g}, reduced χ² = {result.redchi:.4g} "
                          f"({result.ndata} points, {result.nvarys} fitted parameters)"),
             ("work", f"{result.method or '–'}, {result.nfev} model evaluations, "
                      f"{result.elapsed_s:.1f} s")]
    if result.band_gap is not None:
        g = result.band_gap
        stats.append(("band gap", f"{format_pm(g.Eg_eV, g.sigma_eV, 'eV', fmt='.3f')} (Tauc, "
                                  f"{g.transition} transition)"))
    if result.alternatives:
        stats.append(("other thicknesses", ", ".join(f"{a.thickness_nm:.0f} nm (χ²_red "
                                                     f"{a.redchi:.3g})"
                                                     for a in result.alternatives[:5])))
    for k, v in stats:
        fig.text(0.06, y, k, fontsize=8.5, color="#555555")
        fig.text(0.22, y, v, fontsize=8.5)
        y -= 0.018
    y -= 0.008
    warnings = list(result.warnings)
    fig.text(0.06, y, "Warnings" if warnings else "Warnings: none", fontsize=10,
             weight="bold")
    y -= 0.02
    shown = 0
    for w in warnings:
        lines = textwrap.wrap(str(w), 110)
        if shown + len(lines) > 12:
            fig.text(0.08, y, f"… {len(warnings)} warnings in all; see the text report",
                     fontsize=7.5, color="#666666")
            y -= 0.016
            break
        fig.text(0.065, y, "•", fontsize=7.8, va="top")
        fig.text(0.08, y, "\n".join(lines), fontsize=7.8, va="top", linespacing=1.3)
        y -= 0.0135 * len(lines) + 0.004
        shown += len(lines)
    y -= 0.01
    fig.text(0.06, y, "Provenance", fontsize=10, weight="bold")
    y -= 0.02
    prov_rows = [("software", info["software"]), ("recipe hash", info["recipe_hash"] or "–"),
                 ("input file", _short(info["input_file"] or "–", 90)),
                 ("input SHA-256", info["input_sha256"] or "–"), ("created", info["created"])]
    prov_rows += [(str(k).replace("_", " "), _clip(v, 95)) for k, v in provenance.items()
                  if k not in ("software", "recipe_hash", "input_file", "input_sha256",
                               "created") and v not in (None, "")]
    for k, v in prov_rows:
        fig.text(0.06, y, k, fontsize=7.8, color="#555555")
        fig.text(0.22, y, str(v), fontsize=7.8, family=_MONO if "hash" in k or "SHA" in k
                 else None)
        y -= 0.016
    y -= 0.012
    return _fit_param_table(fig, y, params, "Parameters")


def _fit_param_table(fig, top, params, title):
    fig.text(0.06, top, title, fontsize=10, weight="bold")
    y = top - 0.022
    cols = ((0.06, "left", "parameter"), (0.50, "right", "value"), (0.56, "left", "± 1σ"),
            (0.84, "left", "unit"))
    for x, ha, label in cols:
        fig.text(x, y, label, fontsize=8, color="#555555", ha=ha)
    y -= 0.004
    fig.add_artist(_hline(fig, y))
    y -= 0.016
    for p in params:
        for (x, ha, _label), text in zip(cols, _param_cells(p)):
            fig.text(x, y, _short(text, 52), fontsize=7.8, ha=ha,
                     family=_MONO if ha == "right" else None,
                     color=PALETTE["fail"] if "AT BOUND" in text else None)
        y -= 0.0155
    return y


def _hline(fig, y):
    return Line2D([0.06, 0.94], [y, y], transform=fig.transFigure, color="#999999", lw=0.6)


def write_fit_report(result, pdf_path, *, provenance: Mapping | None = None) -> Path:
    """Write the report of one fit as a PDF (atomically) and return its path.

    Page 1 holds the headline (first film's thickness ± 1σ), the fit status,
    χ² and reduced χ², the verdict when the result carries one, every warning,
    the provenance and the parameter table. Page 2 holds the measured and
    fitted spectrum with residuals (:func:`fitting.plots.fit_figure`) and, when
    the stack has a film, n and κ with their 1σ bands
    (:func:`fitting.plots.optical_figure`). Parameters that do not fit on page 1
    continue on a page of their own. Every page carries the provenance footer
    (:func:`fitting.export.provenance_footer`) and "page i of N".

    Parameters
    ----------
    result : FitResult
    pdf_path : path
        Replaced only once the new file is complete.
    provenance : dict, optional
        From :func:`fitting.export.make_provenance` (software, recipe hash, input
        file and SHA-256, creation time); further keys are listed too.
    """
    from .plots import optical_figure
    prov = dict(provenance or {})
    spec = dict(result.spectrum or {})
    created = prov.get("created") or datetime.now(UTC).isoformat(timespec="seconds")
    info = {"software": prov.get("software") or f"pellucid {__version__}",
            "recipe_hash": prov.get("recipe_hash") or "",
            "input_file": prov.get("input_file") or spec.get("source") or "",
            "input_sha256": prov.get("input_sha256") or spec.get("sha256") or "",
            "created": created}
    footer = provenance_footer({**prov, **info})
    params = list(result.params.values())
    first, rest = params[:_FIT_PARAM_ROWS], params[_FIT_PARAM_ROWS:]
    pages: list[tuple[bool, Callable[[Figure], None]]] = [
        (False, lambda fig: _fit_text_page(fig, result, info, prov, first))]
    for start in range(0, len(rest), 50):
        pages.append((False, lambda fig, chunk=rest[start:start + 50]: _fit_param_table(
            fig, 0.955, chunk, "Parameters (continued)")))

    def figures(fig):
        ratios = (5, 6) if result.optical else (5,)
        subs = _panels(fig, "Fit and optical constants" if result.optical else "Fit", ratios)
        fit_figure(result, fig=subs[0])
        if result.optical:
            optical_figure(result, fig=subs[1])
    pages.append((True, figures))

    name = spec.get("name") or Path(info["input_file"]).stem or "spectrum"
    meta = {"Title": f"Pellucid fit report: {name}", "Creator": info["software"],
            "Subject": f"recipe_hash={info['recipe_hash']}; "
                       f"input_sha256={info['input_sha256']}; created={created}"}
    buf = io.BytesIO()
    with PdfPages(buf, metadata=meta) as pdf:
        for n, (constrained, draw) in enumerate(pages, start=1):
            fig = _page(constrained)
            draw(fig)
            _footer(fig, footer, n, len(pages))
            pdf.savefig(fig)
    return atomic_write_bytes(Path(pdf_path), buf.getvalue())


__all__.append("write_fit_report")      # kept beside the function it names
