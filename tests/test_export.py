"""Exports of one fit: files, numbers that read back, provenance, atomic writes.

The FitResult is built by hand from a Stack (fitted = Stack.RT of a Cauchy film on
fused silica, measured = fitted + seeded noise) with made-up σ and correlations, so
these tests exercise the exporter and not the fit engine. The α column is checked
against α = 4πκ/λ (Born & Wolf, Principles of Optics, 7th ed., §14.1, written with
κ as the imaginary part of N) and the hash against :mod:`hashlib` directly.
"""

import hashlib
import json
import math
import os
import shutil
import stat
from datetime import UTC, datetime

import numpy as np
import pytest

from fitting import __version__, export
from fitting.dispersion import Cauchy
from fitting.result import BandGap, FitResult, OpticalConstants, ParamResult
from fitting.stack import Layer, Stack
from fitting.substrates import library_substrate


def make_result(name="sample_01", thickness=500.0, *, seed=0, success=True, band_gap=True,
                npts=240, source="", sha256=""):
    """A FitResult assembled by hand (no fit engine needed)."""
    rng = np.random.default_rng(seed)
    wl = np.linspace(300.0, 1000.0, npts)
    film = Cauchy(2.05, 0.025, urbach=True, k0=0.02, Eu=0.25, E_edge=3.6)
    stack = Stack([Layer("film", film, thickness)], library_substrate("fused_silica", 1.0))
    _, T = stack.RT(wl)
    sigma = np.full(wl.size, 0.002)
    measured = T + rng.normal(0.0, 0.002, wl.size)
    used = wl >= 320.0
    N = film.N(wl)
    n, k = N.real, N.imag
    alpha = 4 * np.pi * k / wl * 1e7
    oc = OpticalConstants("film", wl, n, k, alpha, n_sigma=np.full(wl.size, 0.003),
                          k_sigma=0.05 * k + 1e-5, alpha_sigma=0.05 * alpha + 1.0)
    params = {
        "film_thickness": ParamResult("film_thickness", thickness, 1.3, 480.0, 0.0, 50000.0,
                                      True, "nm"),
        "film_A": ParamResult("film_A", 2.05, 0.004, 1.9, 1.0, 4.0, True, ""),
        "film_B": ParamResult("film_B", 0.025, 0.0011, 0.02, -0.05, 0.5, True, "µm²"),
        "film_C": ParamResult("film_C", 0.0, None, 0.0, -0.05, 0.05, False, "µm⁴"),
    }
    names = ("film_thickness", "film_A", "film_B")
    correl = np.array([[1.0, -0.83, 0.41], [-0.83, 1.0, -0.62], [0.41, -0.62, 1.0]])
    s = np.array([1.3, 0.004, 0.0011])
    gap = BandGap(3.41, 0.02, "indirect", (3.5, 3.9), 0.995, "film") if band_gap else None
    resid = measured - T
    return FitResult(
        success=success, aborted=False,
        message="converged" if success else "did not converge in 2000 evaluations",
        params=params, var_names=names, covar=correl * np.outer(s, s), correl=correl,
        chisqr=float(np.sum((resid[used] / sigma[used]) ** 2)),
        redchi=float(np.sum((resid[used] / sigma[used]) ** 2) / (used.sum() - 3)),
        ndata=int(used.sum()), nvarys=3, nfev=123, elapsed_s=0.42, wavelength_nm=wl,
        measured=measured, fitted=T, residuals=resid, sigma=sigma, used=used, quantity="T",
        optical={"film": oc}, band_gap=gap,
        warnings=("film_A and film_thickness correlated (-0.83)",), stack=stack.to_dict(),
        method="least_squares", spectrum={"name": name, "source": source, "sha256": sha256})


def read_csv(path):
    """Provenance lines, header names and the numbers, read with plain numpy."""
    lines = path.read_text(encoding="utf-8").splitlines()
    n_comment = next(i for i, ln in enumerate(lines) if not ln.startswith("#"))
    meta = dict(ln[2:].split(": ", 1) for ln in lines[:n_comment])
    data = np.loadtxt(path, delimiter=",", skiprows=n_comment + 1, ndmin=2)
    return meta, lines[n_comment].split(","), data


@pytest.fixture(scope="module")
def spectrum_file(tmp_path_factory):
    p = tmp_path_factory.mktemp("input") / "sample_01.csv"
    p.write_text("wavelength,T\n400,0.91\n500,0.88\n", encoding="utf-8")
    return p


@pytest.fixture(scope="module")
def exported_once(tmp_path_factory, spectrum_file):
    res = make_result()
    prov = export.make_provenance(res, recipe_hash="abc123def456", input_path=spectrum_file,
                                  recipe_name="oxide on silica")
    out = tmp_path_factory.mktemp("export") / "out"
    files = export.export_result(res, out, stem="sample_01", provenance=prov,
                                 plots=("png", "svg"))
    return res, prov, files, out


@pytest.fixture
def exported(exported_once, tmp_path):
    """A private copy of one export (rendering figures once keeps the file fast)."""
    res, prov, files, out = exported_once
    mine = tmp_path / "out"
    shutil.copytree(out, mine)
    return res, prov, [mine / p.name for p in files], mine


def test_all_files_written(exported):
    _, _, files, out = exported
    names = sorted(p.name for p in files)
    assert names == sorted([
        "sample_01_nk_film.csv", "sample_01_curves.csv", "sample_01_result.json",
        "sample_01_report.txt", "sample_01_fit.png", "sample_01_fit.svg",
        "sample_01_optical.png", "sample_01_optical.svg", "sample_01_tauc.png",
        "sample_01_tauc.svg"])
    assert sorted(p.name for p in out.iterdir()) == names      # nothing else, no temp files
    for p in files:
        assert p.stat().st_size > 200, p
    assert (out / "sample_01_fit.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert b"<svg" in (out / "sample_01_fit.svg").read_bytes()[:2000]


def test_no_tauc_plot_without_band_gap(tmp_path, monkeypatch):
    saved = []   # which figures are made is the question here, not how they render
    monkeypatch.setattr(export, "save_figure", lambda fig, path, **kw: saved.append(path) or path)
    res = make_result(band_gap=False)
    files = export.export_result(res, tmp_path, stem="s", provenance=export.make_provenance(res),
                                 plots=("png",))
    assert [p.name for p in saved] == ["s_fit.png", "s_optical.png"]
    assert saved == files[-2:]


def test_parts_choose_the_files(tmp_path):
    files = export.export_result(make_result(), tmp_path, stem="s", provenance={},
                                 plots=("png",), parts=("curves", "json"))
    assert [p.name for p in files] == ["s_curves.csv", "s_result.json"]
    with pytest.raises(ValueError, match="'pictures' is unknown"):
        export.export_result(make_result(), tmp_path, stem="s", provenance={},
                             parts=("pictures",))


def test_nk_csv_reads_back_with_units_header(exported):
    res, prov, _, out = exported
    meta, header, data = read_csv(out / "sample_01_nk_film.csv")
    assert header == ["wavelength_nm", "n", "n_sigma", "k", "k_sigma", "alpha_cm-1",
                      "alpha_sigma_cm-1"]
    oc = res.optical["film"]
    for i, arr in enumerate([oc.wavelength_nm, oc.n, oc.n_sigma, oc.k, oc.k_sigma,
                             oc.alpha_cm, oc.alpha_sigma]):
        np.testing.assert_array_equal(data[:, i], arr)   # repr() round-trips doubles exactly
    # α = 4πκ/λ with λ in cm (Born & Wolf §14.1): an independent recomputation.
    np.testing.assert_allclose(data[:, 5], 4 * math.pi * data[:, 3] / (data[:, 0] * 1e-7),
                               rtol=1e-12)
    assert meta["software"] == f"pellucid {__version__}"
    assert meta["recipe_hash"] == "abc123def456"
    assert meta["input_sha256"] == prov["input_sha256"]
    assert meta["layer"] == "film"


def test_curves_csv_reads_back(exported):
    res, _, _, out = exported
    meta, header, data = read_csv(out / "sample_01_curves.csv")
    # Units in the names: a spreadsheet user sees T as a fraction, not percent.
    assert header == ["wavelength_nm", "measured_T_fraction", "fitted_T_fraction",
                      "residual_T_fraction", "sigma_T_fraction", "used"]
    assert tuple(header) == export.CURVE_COLUMNS == export.curve_columns("T")
    np.testing.assert_array_equal(data[:, 0], res.wavelength_nm)
    np.testing.assert_array_equal(data[:, 1], res.measured)
    np.testing.assert_array_equal(data[:, 2], res.fitted)
    np.testing.assert_allclose(data[:, 3], data[:, 1] - data[:, 2], atol=1e-15)
    np.testing.assert_array_equal(data[:, 5].astype(bool), res.used)
    assert meta["quantity"] == "T"
    back = export.read_curves_csv(out / "sample_01_curves.csv")
    np.testing.assert_array_equal(back["used"], res.used)
    np.testing.assert_array_equal(back["measured"], res.measured)
    np.testing.assert_array_equal(back["residuals"], data[:, 3])
    assert back["quantity"] == "T"


def test_curves_csv_of_a_reflectance_fit_names_r(tmp_path):
    res = make_result(band_gap=False)
    res = FitResult(**{**res.__dict__, "quantity": "R"})
    export.export_result(res, tmp_path, stem="r", provenance={}, plots=(), parts=("curves",))
    _, header, _ = read_csv(tmp_path / "r_curves.csv")
    assert header[1:5] == ["measured_R_fraction", "fitted_R_fraction", "residual_R_fraction",
                           "sigma_R_fraction"]
    assert export.read_curves_csv(tmp_path / "r_curves.csv")["quantity"] == "R"


def test_read_curves_csv_takes_the_old_bare_names(tmp_path):
    p = tmp_path / "old_curves.csv"
    p.write_text("# quantity: T\nwavelength_nm,measured,fitted,residual,sigma,used\n"
                 "400.0,0.5,0.49,0.01,0.002,1.0\n401.0,0.6,0.61,-0.01,0.002,0.0\n",
                 encoding="utf-8")
    back = export.read_curves_csv(p)
    np.testing.assert_array_equal(back["fitted"], [0.49, 0.61])
    np.testing.assert_array_equal(back["used"], [True, False])
    bad = tmp_path / "nk.csv"
    bad.write_text("wavelength_nm,n\n400.0,2.0\n", encoding="utf-8")
    with pytest.raises(ValueError, match="not a curves file.*'measured'"):
        export.read_curves_csv(bad)


def test_json_has_parameters_correlations_and_true_sha256(exported, spectrum_file):
    res, _, _, out = exported
    doc = json.loads((out / "sample_01_result.json").read_text(encoding="utf-8"))
    expect = hashlib.sha256(spectrum_file.read_bytes()).hexdigest()
    prov = doc["provenance"]
    assert prov["input_sha256"] == expect
    assert prov["input_file"] == str(spectrum_file)
    assert prov["software"] == f"pellucid {__version__}"
    assert prov["recipe_hash"] == "abc123def456" and prov["recipe_name"] == "oxide on silica"
    created = datetime.fromisoformat(prov["created"])
    assert created.utcoffset().total_seconds() == 0
    assert abs((datetime.now(UTC) - created).total_seconds()) < 300
    assert doc["params"]["film_thickness"]["value"] == 500.0
    assert doc["params"]["film_thickness"]["stderr"] == 1.3
    assert doc["params"]["film_C"]["stderr"] is None
    np.testing.assert_array_equal(np.array(doc["correl"]), res.correl)
    assert doc["var_names"] == list(res.var_names)
    assert doc["band_gap"]["Eg_eV"] == 3.41


def test_json_is_strict_when_values_are_not_finite(tmp_path):
    res = make_result(band_gap=False)
    bad = FitResult(**{**res.__dict__, "redchi": float("nan"), "chisqr": float("inf")})
    export.export_result(bad, tmp_path, stem="x", provenance={}, plots=())
    text = (tmp_path / "x_result.json").read_text(encoding="utf-8")
    doc = json.loads(text, parse_constant=lambda c: pytest.fail(f"non-JSON constant {c}"))
    assert doc["redchi"] is None and doc["chisqr"] is None


def test_text_report_carries_provenance(exported):
    res, prov, _, out = exported
    text = (out / "sample_01_report.txt").read_text(encoding="utf-8")
    assert f"input_sha256: {prov['input_sha256']}" in text
    assert "recipe_hash: abc123def456" in text
    assert res.report() in text


def test_png_metadata_holds_provenance(exported):
    from PIL import Image   # Pillow is a matplotlib dependency
    _, prov, _, out = exported
    info = Image.open(out / "sample_01_fit.png").info
    assert info["Software"] == f"pellucid {__version__}"
    assert prov["input_sha256"] in info["Description"]
    assert "recipe_hash=abc123def456" in info["Description"]


def test_make_provenance_from_result_spectrum():
    res = make_result(source="/data/a.csv", sha256="f" * 64)
    prov = export.make_provenance(res, recipe_hash="h1")
    assert prov["input_file"] == "/data/a.csv" and prov["input_sha256"] == "f" * 64
    assert set(prov) == {"software", "recipe_hash", "input_file", "input_sha256", "created"}


@pytest.mark.parametrize("stem", ["", "a/b", "..", "x\\y"])
def test_bad_stem_is_refused(tmp_path, stem):
    with pytest.raises(ValueError, match="stem"):
        export.export_result(make_result(), tmp_path, stem=stem, provenance={}, plots=())


def test_unknown_plot_format_is_refused_before_writing(tmp_path):
    with pytest.raises(ValueError, match="jpeg"):
        export.export_result(make_result(), tmp_path / "o", stem="s", provenance={},
                             plots=("jpeg",))
    assert not (tmp_path / "o").exists()


def _snapshot(folder):
    return {p.name: p.read_bytes() for p in folder.iterdir()}


def test_failed_write_keeps_old_files_and_leaves_no_temp(exported, monkeypatch):
    res, prov, _, out = exported
    before = _snapshot(out)
    calls = {"n": 0}
    real_fsync = os.fsync

    def fsync_fails_on_third_file(fd):
        if stat.S_ISREG(os.fstat(fd).st_mode):   # files, not the directory fsync
            calls["n"] += 1
            if calls["n"] == 3:   # the JSON: its temp file is written, then the disk "fails"
                raise OSError(28, "No space left on device")
        real_fsync(fd)

    monkeypatch.setattr(os, "fsync", fsync_fails_on_third_file)
    changed = make_result(thickness=612.0, seed=5)
    with pytest.raises(OSError, match="No space"):
        export.export_result(changed, out, stem="sample_01", provenance=prov, plots=("png",))
    after = _snapshot(out)
    assert set(after) == set(before)                       # no temp files left behind
    assert after["sample_01_result.json"] == before["sample_01_result.json"]
    json.loads(after["sample_01_result.json"])             # old file whole and valid
    # the first two files were replaced whole by the new export
    assert after["sample_01_curves.csv"] != before["sample_01_curves.csv"]


def test_figure_render_failing_midway_keeps_old_png(exported, monkeypatch):
    from matplotlib.figure import Figure
    _, prov, _, out = exported
    old = (out / "sample_01_fit.png").read_bytes()

    def savefig_dies(self, fname, **kw):
        fname.write(b"\x89PNG\r\n\x1a\n half an image")
        raise RuntimeError("renderer crashed")

    monkeypatch.setattr(Figure, "savefig", savefig_dies)
    with pytest.raises(RuntimeError, match="renderer"):
        export.export_result(make_result(seed=3), out, stem="sample_01", provenance=prov,
                             plots=("png",))
    assert (out / "sample_01_fit.png").read_bytes() == old
    assert not [p for p in out.iterdir() if p.name.startswith(".") or p.suffix == ".tmp"]


def test_save_figure_leaves_gui_figure_unchanged(tmp_path):
    from fitting.plots import fit_figure
    fig = fit_figure(make_result())
    n_text = len(fig.texts)
    export.save_figure(fig, tmp_path / "f.png", provenance={"software": "pellucid x"})
    assert len(fig.texts) == n_text


def test_export_of_a_real_fit(tmp_path):
    # End to end with the fit engine: whatever fields a real FitResult fills must export.
    from fitting import fit
    from fitting.spectrum import Spectrum
    wl = np.linspace(350.0, 1000.0, 200)
    truth = Stack([Layer("film", Cauchy(2.0, 0.02), 520.0)], library_substrate("fused_silica"))
    T = truth.transmittance(wl) + np.random.default_rng(1).normal(0, 0.002, wl.size)
    start = Stack([Layer("film", Cauchy(1.9, 0.01), 480.0)], library_substrate("fused_silica"))
    res = fit.fit_spectrum(Spectrum(wl, T, name="synthetic"), start)
    files = export.export_result(res, tmp_path, stem="syn", provenance=export.make_provenance(res),
                                 plots=())
    assert {p.name for p in files} >= {"syn_nk_film.csv", "syn_curves.csv", "syn_result.json"}
    doc = json.loads((tmp_path / "syn_result.json").read_text(encoding="utf-8"))
    assert doc["params"]["film_thickness"]["value"] == pytest.approx(res.thickness()[0])
    _, _, data = read_csv(tmp_path / "syn_nk_film.csv")
    np.testing.assert_array_equal(data[:, 1], res.optical["film"].n)


def test_read_table_csv_names_the_line_of_a_damaged_export(tmp_path):
    p = tmp_path / "cut_curves.csv"
    p.write_text("# quantity: T\nwavelength_nm,measured_T_fraction,fitted_T_fraction\n"
                 "400.0,0.5,0.49\n401.0,0.6\n", encoding="utf-8")
    with pytest.raises(ValueError, match=r"cut_curves.csv, line 4: 2 values where the header "
                                         r"has 3 columns"):
        export.read_table_csv(p)
    p.write_text("wavelength_nm,n\n400.0,2.0\n401.0,#REF!\n", encoding="utf-8")
    with pytest.raises(ValueError, match=r"line 3: a value is not a number"):
        export.read_table_csv(p)


def _plain_csv_rows(data):
    """The CSV rows as written before the shared number texts (the contract): repr of each
    value, nan where it is not finite."""
    return [",".join(repr(v) if math.isfinite(v) else "nan" for v in row)
            for row in np.asarray(data, dtype=float).tolist()]


def _plain_json_text(doc):
    """The JSON text as written before the shared number texts (the contract)."""
    def compact(v):
        return json.dumps(v, ensure_ascii=False, allow_nan=False, separators=(", ", ": "))

    parts = []
    for k, v in export.json_safe(doc).items():
        if isinstance(v, dict) and v:
            inner = ",\n".join(f"    {compact(str(k2))}: {compact(v2)}" for k2, v2 in v.items())
            parts.append(f"  {compact(str(k))}: {{\n{inner}\n  }}")
        else:
            parts.append(f"  {compact(str(k))}: {compact(v)}")
    return "{\n" + ",\n".join(parts) + "\n}\n"


def test_tables_and_json_hold_the_same_text_as_plain_formatting(tmp_path):
    # Each array's text is made once and shared by the files; the files must read
    # exactly as when every value was formatted on its own, with NaN, ±inf, -0.0,
    # an array repeated in several places and a name that looks like the JSON's
    # internal stand-ins.
    res = make_result(name="s\ue0000123456789abcdef:0\ue001", npts=60)
    oc = res.optical["film"]
    measured = res.measured.copy()
    measured[[3, 4, 5]] = [np.nan, np.inf, -0.0]
    n_sigma = oc.n_sigma.copy()
    n_sigma[7] = -np.inf
    residuals = res.residuals.copy()
    residuals[5] = -0.0
    sigma = residuals.copy()                           # the same numbers, but +0.0 for -0.0
    sigma[5] = 0.0
    oc = OpticalConstants("film", oc.wavelength_nm, oc.n, oc.k, oc.alpha_cm, n_sigma,
                          oc.k_sigma, oc.alpha_sigma)
    res = FitResult(**{**res.__dict__, "measured": measured, "residuals": residuals,
                       "sigma": sigma,
                       "optical": {"film": oc}, "redchi": float("nan")})
    prov = {"software": "pellucid", "input_file": "s.csv"}
    export.export_result(res, tmp_path, stem="s", provenance=prov, plots=(),
                         parts=("nk", "curves", "json"))
    doc = res.to_dict(curves=True)
    doc["provenance"] = prov
    assert (tmp_path / "s_result.json").read_text(encoding="utf-8") == _plain_json_text(doc)
    nk = np.column_stack([oc.wavelength_nm, oc.n, oc.n_sigma, oc.k, oc.k_sigma, oc.alpha_cm,
                          oc.alpha_sigma])
    curves = np.column_stack([res.wavelength_nm, res.measured, res.fitted, res.residuals,
                              res.sigma, res.used])
    for name, data in (("s_nk_film.csv", nk), ("s_curves.csv", curves)):
        lines = (tmp_path / name).read_text(encoding="utf-8").splitlines()
        first = next(i for i, ln in enumerate(lines) if not ln.startswith("#")) + 1
        assert lines[first:] == _plain_csv_rows(data), name
    assert "-0.0" in (tmp_path / "s_curves.csv").read_text().splitlines()[first + 5]
