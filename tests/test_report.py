"""The batch PDF report: it opens, has the planned pages, shows what it must.

Pages are rendered with poppler's ``pdftoppm`` and read back with ``pdftotext``
(both from poppler-utils, an outside PDF implementation), so these tests check the
file a reader gets, not matplotlib's idea of it.
"""

import html
import math
import re
import shutil
import subprocess

import numpy as np
import pytest
from matplotlib.image import imread

from fitting import export, report
from fitting.recipe import Limit
from test_export import make_result

PDFTOPPM = shutil.which("pdftoppm")
PDFTOTEXT = shutil.which("pdftotext")
needs_poppler = pytest.mark.skipif(
    PDFTOPPM is None, reason="pdftoppm not found: install poppler-utils to render report pages")
needs_pdftotext = pytest.mark.skipif(
    PDFTOTEXT is None, reason="pdftotext not found: install poppler-utils to read report text")

SPEC = {"film_thickness": {"min": 475, "max": 525}}
RECIPE = {"name": "oxide on silica, line 2", "hash": "3f2a9c0d11be7c"}


def render(pdf, tmp_path, dpi=40):
    """Render every page to PNG with pdftoppm; return the images in page order."""
    out = tmp_path / "render"
    out.mkdir(exist_ok=True)
    subprocess.run([PDFTOPPM, "-r", str(dpi), "-png", str(pdf), str(out / "p")], check=True,
                   capture_output=True, timeout=60)
    files = sorted(out.glob("p-*.png"), key=lambda p: int(p.stem.split("-")[1]))
    return [imread(f) for f in files]


def page_text(pdf, page):
    out = subprocess.run([PDFTOTEXT, "-f", str(page), "-l", str(page), "-layout", str(pdf), "-"],
                         check=True, capture_output=True, text=True, timeout=60)
    return out.stdout


def ink(img):
    """(grey-level std dev, fraction of non-white pixels) of a rendered page."""
    grey = img[..., :3].mean(axis=2)
    return float(grey.std()), float((grey < 0.9).mean())


@pytest.fixture(scope="module")
def batch(tmp_path_factory):
    """Five spectra: four exported fits (thicknesses 490-540 nm) and one failure."""
    root = tmp_path_factory.mktemp("batch")
    rows = []
    for i, (d, redchi) in enumerate([(490.0, 1.1), (505.0, 7.5), (512.0, 2.0), (540.0, 3.3)]):
        name = f"coupon_{i + 1:02d}"
        res = make_result(name, d, seed=i, band_gap=False, npts=120)
        export.export_result(res, root / name, stem=name, provenance={}, plots=())
        rows.append({"file": f"/lab/run4/{name}.csv", "sha256": f"{i + 10:x}" * 64,
                     "status": "ok", "film_thickness": d, "film_thickness_sigma": 1.4,
                     "n_633": res.optical["film"].at(633)[0], "redchi": redchi,
                     "warnings": ["a"] * i, "result_dir": name})
    rows.insert(2, {"file": "/lab/run4/coupon_x.csv", "status": "failed",
                    "reason": "file holds absorbance above 6; check the instrument mode"})
    return rows, root


def write(batch, path, **kw):
    rows, root = batch
    kw.setdefault("recipe", RECIPE)
    kw.setdefault("spec", SPEC)
    return report.write_batch_report(rows, root, path, **kw)


@pytest.fixture(scope="module")
def pdf(batch, tmp_path_factory):
    """One report of the five-spectrum batch, shared by the read-only tests."""
    return write(batch, tmp_path_factory.mktemp("report") / "report.pdf",
                 provenance={"software": "pellucid 9.9", "created": "2026-03-01T02:00:00+00:00"})


# overview + thickness + optical + failed list + ceil(4 worst fits / 2)
EXPECTED_PAGES = 1 + 1 + 1 + 1 + 2


@needs_poppler
def test_report_opens_with_planned_pages_and_is_not_blank(pdf, tmp_path):
    assert pdf.read_bytes()[:5] == b"%PDF-"
    pages = render(pdf, tmp_path)
    assert len(pages) == EXPECTED_PAGES
    std, frac = ink(pages[0])
    assert std > 0.05 and frac > 0.01, (std, frac)
    for img in pages[1:]:            # every page carries more than a heading and a footer
        assert ink(img)[1] > 0.004
    blank = np.ones_like(pages[0])   # the check itself can fail: a white page does
    assert ink(blank) == (0.0, 0.0)


@needs_pdftotext
def test_overview_shows_provenance_failures_and_spec(pdf):
    text = page_text(pdf, 1)
    assert "pellucid 9.9" in text and "3f2a9c0d11be7c" in text
    assert "oxide on silica, line 2" in text and "2026-03-01T02:00:00+00:00" in text
    assert "3 of 4" in text                         # 540 nm is outside 475-525
    assert "FAIL" in text and "failed" in text
    assert "absorbance above 6" in text             # the failure's reason is in the table
    assert "505.0 ± 1.4" in text
    assert "bbbbbbbbbb" in text and "b" * 11 not in text    # coupon_02's hash, 10 digits
    failed_page = page_text(pdf, 4)
    assert "coupon_x.csv" in failed_page and "check the instrument mode" in failed_page


@needs_pdftotext
def test_worst_fits_come_first_and_are_drawn_from_exports(pdf):
    first, second = page_text(pdf, 5), page_text(pdf, 6)
    # redchi 7.5 (coupon_02), then 3.3 (coupon_04), then 2.0, 1.1
    assert first.index("coupon_02") < first.index("coupon_04")
    assert "coupon_03" in second and "coupon_01" in second
    assert "no exported curves" not in first + second
    assert "Wavelength (nm)" in first
    overlay = page_text(pdf, 3)              # n/κ read back from every exported CSV
    assert "n and κ of 4 successful spectra" in overlay and "no readable" not in overlay


@needs_poppler
def test_recipe_object_limits_and_missing_keys(tmp_path):
    # Limits as recipe Limit objects (target ± tol), rows with almost nothing in them.
    class FakeRecipe:
        name = "bare rows"
        limits = {"film_thickness": Limit(target=500, tol=10)}

        def hash(self):
            return "cafe01"

    rows = [{"file": "a.csv", "film_thickness": 505.0}, {"file": "b.csv", "status": "error"},
            {}, {"film_thickness": "not a number", "redchi": None, "warnings": "2"}]
    pdf = report.write_batch_report(rows, tmp_path / "nothing_here", tmp_path / "r.pdf",
                                    recipe=FakeRecipe(), worst=0)
    # overview + thickness + optical + failed; worst=0 asks for no fit pages
    assert len(render(pdf, tmp_path, dpi=20)) == 1 + 1 + 1 + 1
    if PDFTOTEXT:
        text = page_text(pdf, 1)
        assert "cafe01" in text and "1 of 1" in text and "no reason recorded" in text


@needs_poppler
def test_two_hundred_rows_paginate(tmp_path):
    rng = np.random.default_rng(7)
    rows = []
    for i in range(200):
        if i % 25 == 0:
            rows.append({"file": f"s{i:04d}.csv", "status": "failed", "reason": "too noisy"})
        else:
            rows.append({"file": f"s{i:04d}.csv", "status": "ok",
                         "film_thickness": 500 + rng.normal(0, 10), "film_thickness_sigma": 1.0,
                         "n_633": 2.0, "redchi": float(rng.uniform(0.5, 3)), "warnings": 0})
    pdf = report.write_batch_report(rows, tmp_path, tmp_path / "big.pdf", spec=SPEC, worst=2)
    table_pages = 1 + math.ceil((200 - report.ROWS_FIRST_PAGE) / report.ROWS_PER_PAGE)
    expected = table_pages + 1 + 1 + 1 + 1      # + thickness, optical, failed, 2 worst
    assert table_pages == 5
    assert len(render(pdf, tmp_path, dpi=15)) == expected
    if PDFTOTEXT:
        assert "s0199.csv" in page_text(pdf, table_pages)


def test_failed_render_keeps_old_report(batch, pdf, tmp_path, monkeypatch):
    from matplotlib.backends.backend_pdf import PdfPages
    target = tmp_path / "report.pdf"
    shutil.copy(pdf, target)
    old = target.read_bytes()
    calls = {"n": 0}
    real = PdfPages.savefig

    def dies_on_second_page(self, *a, **k):
        calls["n"] += 1
        if calls["n"] == 2:
            raise RuntimeError("out of memory")
        return real(self, *a, **k)

    monkeypatch.setattr(PdfPages, "savefig", dies_on_second_page)
    with pytest.raises(RuntimeError, match="out of memory"):
        write(batch, target)
    assert target.read_bytes() == old
    assert [p.name for p in tmp_path.iterdir()] == ["report.pdf"]   # no temp file left


@needs_pdftotext
def test_rows_from_the_batch_runner(tmp_path):
    # The rows the batch runner really writes (fitting.batch.summary_row): n at 633 nm as
    # "film_n@633", warnings as one "; "-joined text, spec verdicts as "pass"/"fail"/"n/a".
    from fitting import batch as batch_mod
    from fitting.recipe import Recipe
    from fitting.stack import Stack

    base = make_result(band_gap=False, npts=80)
    recipe = Recipe(Stack.from_dict(base.stack), name="line 5 oxide",
                    limits={"film_thickness": {"target": 500, "tol": 10}})
    rows = []
    for i, d in enumerate([498.0, 530.0]):
        res = make_result(f"c{i}", d, seed=i, band_gap=False, npts=80)
        folder = tmp_path / "spectra" / f"c{i}-0123456789"
        export.export_result(res, folder, stem=f"c{i}", provenance={}, plots=())
        rows.append(batch_mod.summary_row(res, recipe, index=i, path=f"/in/c{i}.csv",
                                          sha256="0" * 64, rhash=recipe.hash(), status="ok",
                                          output=f"spectra/c{i}-0123456789"))
    rows.append(batch_mod.summary_row(None, recipe, index=2, path="/in/bad.csv", sha256="",
                                      rhash=recipe.hash(), status="error",
                                      reason="cannot read the file: Permission denied"))
    pdf = report.write_batch_report(rows, tmp_path, tmp_path / "report.pdf", recipe=recipe,
                                    spec=recipe.limits, worst=0)
    text = page_text(pdf, 1)
    n633 = f"{rows[0]['film_n@633']:.4f}"
    assert text.count(n633) == 2                    # both fitted rows show n(633)
    assert recipe.hash() in text and "line 5 oxide" in text
    assert "1 of 2" in text and "Permission denied" in text
    assert "530.0" in text and "FAIL" in text
    assert "no readable" not in page_text(pdf, 3)


@needs_pdftotext
def test_unconverged_fit_with_curves_is_plotted_first(batch, tmp_path):
    rows, root = batch
    res = make_result("stuck", 505.0, seed=9, success=False, band_gap=False, npts=80)
    export.export_result(res, root / "stuck", stem="stuck", provenance={}, plots=())
    rows = rows + [{"file": "/lab/run4/stuck.csv", "status": "failed", "result_dir": "stuck",
                    "reason": res.message, "film_thickness": 505.0, "redchi": 40.0}]
    pdf = report.write_batch_report(rows, root, tmp_path / "r.pdf", spec=SPEC, worst=1)
    # overview, thickness, optical, failed list, 1 unconverged plot, 1 worst plot
    assert len(render(pdf, tmp_path, dpi=15)) == 6
    text = page_text(pdf, 5)
    assert "did not converge" in text and "stuck.csv" in text and "2000 evaluations" in text
    assert "coupon_02" in page_text(pdf, 6)          # then the worst finished fit


@needs_pdftotext
def test_failed_page_gives_the_whole_reason_without_the_file_name(tmp_path):
    # The reader's messages end with what to do; a one-line cut would lose exactly that.
    advice = "save or export it again as UTF-8 text, or set the reader's encoding"
    rows = [{"file": "/lab/run4/mainframe.csv", "status": "error",
             "reason": "/lab/run4/mainframe.csv, line 1: the text is unreadable: the file is "
                       "saved in a character encoding Pellucid does not know (it reads UTF-8, "
                       f"UTF-16, UTF-32, Latin-1 and Windows-1252); {advice}"},
            {"file": "runs/ir.csv", "status": "error",
             "reason": "ir: no data point lies in the fit range 330-1100 nm; widen the fit range"}]
    pdf = report.write_batch_report(rows, tmp_path, tmp_path / "r.pdf", spec={})
    text = " ".join(page_text(pdf, 4).split())     # overview, thickness, optical, failed
    assert "error: line 1: the text is unreadable" in text
    assert advice in text
    assert "error: no data point lies" in text      # "ir: " (the spectrum name) dropped
    assert "mainframe.csv, line 1" not in text


@needs_pdftotext
def test_verdicts_are_counted_shown_and_rank_the_fits_to_look_at(batch, tmp_path):
    rows, root = batch
    verdicts = {"coupon_01": ("poor", "the model has no absorption below 400 nm"),
                "coupon_02": ("good", ""), "coupon_03": ("check", "n at 633 nm lies outside "
                                                                   "the measured range"),
                "coupon_04": ("good", "")}
    marked = []
    for r in rows:
        stem = r["file"].rsplit("/", 1)[-1][:-4]
        v = verdicts.get(stem)
        marked.append({**r, "verdict": v[0], "verdict_reasons": v[1]} if v else r)
    pdf = report.write_batch_report(marked, root, tmp_path / "v.pdf", recipe=RECIPE,
                                    spec=SPEC)
    overview = page_text(pdf, 1)
    assert "2 good, 1 check, 1 poor" in overview
    table = [ln for ln in overview.splitlines() if "coupon_0" in ln]
    assert [("poor" in ln, "check" in ln) for ln in table] == \
        [(True, False), (False, False), (False, True), (False, False)]
    first = page_text(pdf, 5)
    assert "Fits to look at" in first
    # coupon_01 (poor) before coupon_03 (check), although its χ² is the lowest.
    assert first.index("coupon_01") < first.index("coupon_03")
    assert "no absorption below 400 nm" in first


def test_spec_column_judges_rows_by_the_batch_summary_rule():
    # Rows without a "spec_pass" are judged with fitting.limits, as the batch summary is:
    # any limit failed -> FAIL; a limited quantity missing -> not judged, never "pass".
    spec = {"film_thickness": {"min": 475, "max": 525}, "redchi": {"max": 5}}
    assert report._spec_state({"film_thickness": 525.0, "redchi": 1.0}, spec, "") == "pass"
    assert report._spec_state({"film_thickness": 500.0}, spec, "") is None
    assert report._spec_state({"film_thickness": 530.0}, spec, "") == "fail"
    assert report._spec_state({"film_thickness": 500.0, "spec_pass": "fail"}, spec, "") == "fail"


# -- the summary table: every row, marked where it needs a look ------------------------
def words_on_page(pdf, page):
    """(text, xMin, yMin, xMax, yMax) of every word pdftotext finds on ``page``, in points
    from the top left."""
    out = subprocess.run([PDFTOTEXT, "-f", str(page), "-l", str(page), "-bbox", str(pdf), "-"],
                         check=True, capture_output=True, text=True, timeout=60).stdout
    pat = re.compile(r'<word xMin="([\d.]+)" yMin="([\d.]+)" xMax="([\d.]+)" yMax="([\d.]+)">'
                     r'([^<]*)</word>')
    return [(html.unescape(m[5]), *map(float, m.groups()[:4])) for m in pat.finditer(out)]


def row_words(words, name):
    """The words on the table row whose file is ``name`` (same baseline, within 2 pt)."""
    (y,) = [w[2] for w in words if w[0] == name]
    return [w for w in words if abs(w[2] - y) < 2]


def ink_colour(img, box):
    """Mean colour of the inked pixels inside ``box`` (x0, y0, x1, y1 in pixels)."""
    x0, y0, x1, y1 = (int(round(v)) for v in box)
    rgb = img[y0:y1 + 1, x0:x1 + 1, :3].reshape(-1, 3)
    inked = rgb[rgb.min(axis=1) < 0.6]
    assert len(inked) > 5, "no ink where pdftotext puts the word"
    return inked.mean(axis=0)


def is_red(c):       # PALETTE["fail"], #D55E00
    return c[0] - c[2] > 0.4 and c[0] > 0.5


def is_orange(c):    # PALETTE["spec"], #E69F00
    return c[0] - c[2] > 0.4 and c[1] > 0.4


def is_ink(c):       # the dark grey of ordinary text
    return c.max() - c.min() < 0.15


def big_batch(n, every_failed=20):
    rows = []
    for i in range(n):
        name = f"run7_{i:04d}.csv"
        if i % every_failed == 7:
            rows.append({"file": f"/lab/run7/{name}", "status": "error",
                         "reason": f"{name}: no data point lies in the fit range"})
            continue
        rows.append({"file": f"/lab/run7/{name}", "status": "ok", "sha256": "ab" * 32,
                     "film_thickness": 470.0 + (i % 60), "film_thickness_sigma": 0.5,
                     "n_633": 1.46, "redchi": 1.0 + (i % 9) / 3, "warnings": i % 3,
                     "verdict": ("good", "good", "check", "poor")[i % 4]})
    return rows


@needs_pdftotext
@needs_poppler
def test_three_hundred_rows_all_listed_on_the_planned_pages(tmp_path):
    rows = big_batch(300)
    pdf = report.write_batch_report(rows, tmp_path, tmp_path / "r.pdf", spec=SPEC, worst=2)
    table_pages = 1 + math.ceil((300 - report.ROWS_FIRST_PAGE) / report.ROWS_PER_PAGE)
    failed = sum(not r.get("verdict") for r in rows)
    assert (table_pages, failed) == (7, 15)
    # + thickness, optical, one page of failures, one page of the two worst fits
    assert len(render(pdf, tmp_path, dpi=10)) == table_pages + 1 + 1 + 1 + 1
    out = subprocess.run([PDFTOTEXT, "-f", "1", "-l", str(table_pages), "-layout", str(pdf),
                          "-"], check=True, capture_output=True, text=True, timeout=60).stdout
    for i in range(300):
        assert out.count(f"run7_{i:04d}.csv") == 1, i
    assert "Summary table, spectra 297–300" in out
    assert "run7_0000" not in page_text(pdf, table_pages + 1)     # the table ended before


@needs_pdftotext
@needs_poppler
def test_rows_that_need_a_look_are_marked_in_colour(tmp_path):
    rows = [{"file": "good.csv", "status": "ok", "verdict": "good", "film_thickness": 500.0},
            {"file": "poor.csv", "status": "ok", "verdict": "poor", "film_thickness": 500.0},
            {"file": "check.csv", "status": "ok", "verdict": "check", "film_thickness": 500.0},
            {"file": "thick.csv", "status": "ok", "verdict": "good", "film_thickness": 560.0},
            {"file": "broken.csv", "status": "failed", "reason": "the fit did not converge"}]
    pdf = report.write_batch_report(rows, tmp_path, tmp_path / "r.pdf", spec=SPEC, worst=0)
    words = words_on_page(pdf, 1)
    subprocess.run([PDFTOPPM, "-r", "72", "-f", "1", "-l", "1", "-png", str(pdf),
                    str(tmp_path / "p")], check=True, capture_output=True, timeout=60)
    img = imread(next(tmp_path.glob("p-*.png")))      # 72 dpi: one pixel per point

    def colour(name, word):
        (w,) = [w for w in row_words(words, name) if w[0] == word]
        return ink_colour(img, w[1:])

    assert is_ink(colour("good.csv", "good")) and is_ink(colour("good.csv", "fitted"))
    assert is_red(colour("poor.csv", "poor")) and is_ink(colour("poor.csv", "fitted"))
    assert is_orange(colour("check.csv", "check"))
    assert is_red(colour("thick.csv", "FAIL")) and is_ink(colour("thick.csv", "good"))
    assert is_red(colour("broken.csv", "failed"))
    assert is_red(colour("broken.csv", "converge"))       # the reason, in the row
    assert not is_red(colour("broken.csv", "broken.csv"))


@needs_pdftotext
def test_a_finished_fit_reads_fitted_and_the_stored_status_is_untouched(batch, pdf):
    rows, _root = batch
    table = [ln for ln in page_text(pdf, 1).splitlines() if "coupon_" in ln]
    assert len(table) == 5
    for ln in table:
        assert ("coupon_x" in ln) == (" failed " in f" {ln} "), ln
        assert ("coupon_x" not in ln) == (" fitted " in f" {ln} "), ln
        assert " ok " not in f" {ln} ", ln
    assert [r["status"] for r in rows] == ["ok", "ok", "failed", "ok", "ok"]
    overview = " ".join(page_text(pdf, 1).split())
    assert "fitted 4 (status “fitted” in the table" in overview


@needs_pdftotext
def test_names_outside_the_core_fonts_come_out_as_written(tmp_path):
    # The text pages use the PDF core fonts (Windows-1252); a page with a Greek or
    # Cyrillic file name is set in DejaVu instead, so the name is not turned into "?".
    rows = [{"file": "/lab/Probe_αβ_μ.csv", "status": "ok", "film_thickness": 500.0},
            {"file": "/lab/Образец-3.csv", "status": "error", "reason": "сбой: no data"},
            {"file": "/lab/plain.csv", "status": "ok", "film_thickness": 501.0}]
    pdf = report.write_batch_report(rows, tmp_path, tmp_path / "r.pdf", spec=SPEC, worst=0)
    text = page_text(pdf, 1)
    assert "Probe_αβ_μ.csv" in text and "Образец-3.csv" in text and "plain.csv" in text
    assert "?" not in text
    assert "сбой: no data" in page_text(pdf, 4)                     # the failures page


def test_a_table_page_is_a_few_artists_however_many_rows():
    # What made big reports slow was one Text per cell; the table must stay a handful
    # of artists per page (a line per row inside them), whatever the number of rows.
    from matplotlib.figure import Figure
    counts = []
    for n in (10, report.ROWS_PER_PAGE):           # each with a failure (row 8)
        fig = Figure(figsize=report.A4_INCHES)
        report._draw_table(fig, 0.93, big_batch(n), 0, "film_thickness", SPEC,
                           {"input_folder": "/lab/run7"})
        counts.append(len(fig.get_children()))
    assert counts[0] == counts[1] <= 8, counts


@needs_pdftotext
def test_many_limits_push_rows_to_the_next_page_not_onto_the_footer(tmp_path):
    spec = {"film_thickness": {"min": 475, "max": 525}, "redchi": {"max": 3},
            "n_633": {"min": 1.4}, "film_thickness_sigma": {"max": 1}, "warnings": {"max": 2}}
    rows = big_batch(120)
    pdf = report.write_batch_report(rows, tmp_path, tmp_path / "r.pdf", spec=spec, worst=0)
    words = words_on_page(pdf, 1)
    (footer_top,) = [w[2] for w in words if w[0] == "page"]
    names = [w for w in words if w[0].startswith("run7_")]
    assert 20 < len(names) < report.ROWS_FIRST_PAGE       # fewer rows than with one limit
    assert max(w[4] for w in names) < footer_top - 2      # the last row clears the footer
    text = "".join(page_text(pdf, p) for p in (1, 2, 3))
    assert [text.count(f"run7_{i:04d}.csv") for i in range(120)] == [1] * 120
