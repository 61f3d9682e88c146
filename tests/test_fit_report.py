"""The single-fit PDF report (fitting.report.write_fit_report) and the "pdf" export part.

Pages are rendered with poppler's ``pdftoppm`` and read back with ``pdftotext`` (an
outside PDF implementation), as in test_report.py, so the checks see the file a
process engineer opens.
"""

from dataclasses import dataclass, replace

import pytest

from fitting import export, report
from fitting.result import FitResult, ParamResult
from test_export import make_result
from test_report import PDFTOPPM, PDFTOTEXT, ink, page_text, render

needs_poppler = pytest.mark.skipif(PDFTOPPM is None or PDFTOTEXT is None,
                                   reason="poppler-utils (pdftoppm, pdftotext) not found")
PROV = {"software": "pellucid 9.9", "recipe_hash": "3f2a9c0d11be7c" + "0" * 50,
        "input_file": "/lab/line2/coupon_07.csv", "input_sha256": "ab12" * 16,
        "created": "2031-04-02T10:00:00+00:00",
        "reference_correction": "(S - D) / (B - D), B = base.txt"}


def with_verdict(base, verdict, reasons):
    """``base`` with a verdict: through its own fields where FitResult has them, else a
    subclass that adds them (the fields a later FitResult carries)."""
    if "verdict" in FitResult.__dataclass_fields__:
        return replace(base, verdict=verdict, verdict_reasons=tuple(reasons))

    @dataclass(frozen=True)
    class Judged(FitResult):
        verdict: str = ""
        verdict_reasons: tuple = ()

    return Judged(**{f: getattr(base, f) for f in FitResult.__dataclass_fields__},
                  verdict=verdict, verdict_reasons=tuple(reasons))


@needs_poppler
def test_fit_report_has_headline_warnings_parameters_figures_and_provenance(tmp_path):
    res = make_result("coupon_07", 512.3, seed=2)
    pdf = report.write_fit_report(res, tmp_path / "r.pdf", provenance=PROV)
    pages = render(pdf, tmp_path)
    assert len(pages) == 2
    p1 = " ".join(page_text(pdf, 1).split())
    assert "Pellucid fit report" in p1 and "coupon_07" in p1
    assert "thickness 512.3 ± 1.3 nm" in p1                  # value ± σ of make_result
    assert "reduced χ² =" in p1 and "converged" in p1
    assert "film_A and film_thickness correlated" in p1     # the result's warning
    for name in ("film_thickness", "film_A", "film_B", "film_C", "fixed"):
        assert name in p1, name
    assert "Tauc" in p1 and "3.410 ± 0.020 eV" in p1        # band gap of make_result
    assert "3f2a9c0d11be7c" in p1 and "ab12ab12" in p1 and "base.txt" in p1
    assert "page 1 of 2" in p1
    p2 = page_text(pdf, 2)
    assert "Wavelength (nm)" in p2 and "meas. − fit" in p2 and "Refractive index n" in p2
    assert "page 2 of 2" in p2
    # Page 2 holds two drawn figures (fit and n, κ), not an empty page.
    std, frac = ink(pages[1])
    assert frac > 0.03 and std > 0.05


@needs_poppler
def test_fit_report_shows_a_verdict_and_continues_a_long_parameter_table(tmp_path):
    base = make_result("c", 480.0, success=False)
    params = dict(base.params)
    for i in range(40):
        params[f"film_o{i}_f"] = ParamResult(f"film_o{i}_f", 0.1 * i, 0.01, None, 0.0, 10.0)
    res = with_verdict(replace(base, params=params), "poor", ["χ² far above the noise"])
    pdf = report.write_fit_report(res, tmp_path / "r.pdf", provenance={})
    assert len(render(pdf, tmp_path, dpi=20)) == 3
    p1 = " ".join(page_text(pdf, 1).split())
    assert "verdict: poor (χ² far above the noise)" in p1
    assert "did NOT converge" in p1
    p2 = " ".join(page_text(pdf, 2).split())
    assert "Parameters (continued)" in p2 and "film_o39_f" in p2


def test_pdf_part_is_written_only_when_asked(tmp_path):
    res = make_result("c", 500.0, npts=80)
    files = export.export_result(res, tmp_path / "a", stem="c", provenance=PROV, plots=())
    assert not any(f.suffix == ".pdf" for f in files)
    files = export.export_result(res, tmp_path / "b", stem="c", provenance=PROV,
                                 parts=("pdf",))
    assert [f.name for f in files] == ["c_report.pdf"]
    assert files[0].read_bytes().startswith(b"%PDF")
    with pytest.raises(ValueError, match="unknown"):
        export.export_result(res, tmp_path / "c", stem="c", provenance=PROV, parts=("pdfs",))
