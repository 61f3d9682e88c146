"""Figure builders: what they draw, checked on the artists (no pixels compared)."""

import numpy as np
import pytest
from matplotlib.collections import PolyCollection
from matplotlib.figure import Figure

from fitting import plots
from fitting.recipe import Limit
from fitting.result import BandGap, OpticalConstants
from fitting.units import HC_EV_NM
from test_export import make_result


@pytest.fixture(scope="module")
def result():
    return make_result(npts=120)


def test_fit_figure_draws_measured_fitted_and_residuals(result):
    fig = plots.fit_figure(result)
    ax, axr = fig.axes
    fitted = [ln for ln in ax.lines if ln.get_label() == "fitted"][0]
    np.testing.assert_array_equal(fitted.get_ydata(), result.fitted)
    assert ax.get_ylabel().startswith("Transmittance") and "(nm)" in axr.get_xlabel()
    assert "sample_01" in fig.get_suptitle() and "500.0 ± 1.3 nm" in fig.get_suptitle()
    used = result.used
    res_line = axr.lines[1]
    y = res_line.get_ydata()
    np.testing.assert_allclose(y[used], (result.measured - result.fitted)[used])
    assert np.isnan(y[~used]).all()          # the line breaks where points are excluded


def test_fit_figure_reuses_a_given_figure(result):
    gui = Figure()
    for _ in range(3):                       # the GUI redraws into its own canvas
        assert plots.fit_figure(result, fig=gui) is gui
    assert len(gui.axes) == 2


def test_fit_figure_from_exported_curves():
    wl = np.linspace(400, 800, 50)
    fig = plots.fit_figure({"wavelength_nm": wl, "measured": np.full(50, 0.9),
                            "fitted": np.full(50, 0.89), "name": "from csv"})
    assert "from csv" in fig.get_suptitle()
    np.testing.assert_allclose(fig.axes[1].lines[1].get_ydata(), 0.01)   # all points used


def test_optical_figure_has_bands_and_log_alpha(result):
    fig = plots.optical_figure(result, alpha=True)
    axn, axk, axa = fig.axes
    assert any(isinstance(c, PolyCollection) for c in axn.collections)   # the ±1σ band
    assert "±1σ (at most 0.003)" in [t.get_text() for t in axn.get_legend().get_texts()]
    assert axa.get_yscale() == "log" and "cm⁻¹" in axa.get_ylabel()
    np.testing.assert_array_equal(axn.lines[0].get_ydata(), result.optical["film"].n)
    assert "layer film" in fig.get_suptitle()


def test_alpha_panel_has_a_sigma_band(result):
    # σα = 4πσκ/λ (α = 4πκ/λ is linear in κ; Born & Wolf §14.1): the band's upper edge
    # is α + σα from the result's own arrays.
    fig = plots.optical_figure(result, alpha=True)
    axa = fig.axes[2]
    bands = [c for c in axa.collections if isinstance(c, PolyCollection)]
    assert len(bands) == 1
    oc = result.optical["film"]
    top = bands[0].get_paths()[0].vertices[:, 1]
    assert np.nanmax(top) == pytest.approx(np.nanmax(oc.alpha_cm + oc.alpha_sigma), rel=1e-9)
    label = [t.get_text() for t in axa.get_legend().get_texts()][1]
    assert label.startswith("±1σ (at most") and label.endswith("cm⁻¹)")


def test_alpha_band_from_kappa_sigma_when_no_alpha_sigma_is_given():
    wl = np.linspace(300, 500, 30)
    k = np.linspace(0.2, 0.0, 30)
    curves = {"wavelength_nm": wl, "n": np.full(30, 2.0), "k": k, "n_sigma": np.full(30, 1e-3),
              "k_sigma": np.full(30, 1e-3), "name": "csv"}
    axa = plots.optical_figure(curves, alpha=True).axes[2]
    band = [c for c in axa.collections if isinstance(c, PolyCollection)][0]
    verts = band.get_paths()[0].vertices
    expect = 4 * np.pi * (k[0] + 1e-3) / wl[0] * 1e7
    assert np.nanmax(verts[:, 1]) == pytest.approx(expect, rel=1e-9)
    assert np.nanmin(verts[:, 1]) > 0          # a log axis: the band stays above zero


def test_optical_figure_without_sigma_has_no_band():
    wl = np.linspace(400, 800, 20)
    oc = OpticalConstants("f", wl, np.full(20, 2.0), np.zeros(20), np.zeros(20))
    fig = plots.optical_figure(oc)
    assert not fig.axes[0].collections


def test_tauc_line_meets_zero_at_the_gap():
    # Direct allowed gap: (αhν)² = A (hν - Eg) above Eg (Tauc, Grigorovici & Vancu 1966).
    Eg = 3.30
    wl = np.linspace(300, 400, 200)          # 3.1-4.1 eV, the gap inside
    E = HC_EV_NM / wl
    alpha = np.sqrt(2e11 * np.clip(E - Eg, 0, None)) / E
    k = alpha * wl * 1e-7 / (4 * np.pi)
    oc = OpticalConstants("film", wl, np.full(wl.size, 2.2), k, alpha)
    base = make_result(band_gap=False, npts=40)
    res = type(base)(**{**base.__dict__, "optical": {"film": oc},
                        "band_gap": BandGap(Eg, 0.01, "direct", (3.45, 4.0), 0.999, "film")})
    fig = plots.tauc_figure(res)
    line = [ln for ln in fig.axes[0].lines if ln.get_linestyle() == "--"][0]
    x, y = line.get_xdata(), line.get_ydata()
    assert x[0] == pytest.approx(Eg, abs=1e-6) and y[0] == pytest.approx(0, abs=1e-3 * y[-1])
    assert "Eg = 3.300 ± 0.010 eV" in [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    # The axis starts just below the edge, not at the data's low-energy end (3.1 eV).
    left, right = fig.axes[0].get_xlim()
    assert Eg - 0.6 < left < Eg and right >= E.max()


def test_tauc_axis_skips_the_long_transparent_range():
    base = make_result(npts=40)
    oc = base.optical["film"]
    wl = np.linspace(300, 1100, 400)         # 1.1-4.1 eV; absorbing only above 3.3 eV
    E = HC_EV_NM / wl
    alpha = np.sqrt(2e11 * np.clip(E - 3.3, 0, None)) / E
    oc = OpticalConstants("film", wl, np.full(wl.size, 2.2), alpha * wl * 1e-7 / (4 * np.pi),
                          alpha)
    res = type(base)(**{**base.__dict__, "optical": {"film": oc},
                        "band_gap": BandGap(3.3, 0.01, "direct", (3.45, 4.0), 0.999, "film")})
    left, _ = plots.tauc_figure(res).axes[0].get_xlim()
    assert left > 2.5


def test_tauc_figure_needs_a_band_gap():
    with pytest.raises(ValueError, match="no band gap"):
        plots.tauc_figure(make_result(band_gap=False, npts=40))


def rows_for(thicknesses, failed=()):
    rows = [{"file": f"s{i}.csv", "status": "ok", "film_thickness": d,
             "film_thickness_sigma": 1.0} for i, d in enumerate(thicknesses)]
    for i in failed:
        rows[i] = {"file": f"s{i}.csv", "status": "failed", "reason": "x"}
    return rows


def test_trend_marks_spec_violations_and_failures():
    rows = rows_for([470, 480, 500, 530, 510, 0], failed=[5])
    fig = plots.thickness_trend_figure(rows, {"film_thickness": {"min": 475, "max": 525}})
    ax = fig.axes[0]
    labels = {t.get_text() for t in ax.get_legend().get_texts()}
    assert labels == {"fitted", "outside spec", "failed (1)"}
    limits = sorted(ln.get_ydata()[0] for ln in ax.lines if ln.get_linestyle() == "--")
    assert limits == [475, 525]
    ax.figure.canvas.draw()
    pts = {c.get_label(): c for c in ax.containers}
    assert len(pts["outside spec"].lines[0].get_xdata()) == 2       # 470 and 530


def test_trend_spec_labels_do_not_overlap_when_limits_are_close():
    # A batch spanning 60-1800 nm puts limits 475 and 525 a few pixels apart.
    rows = rows_for([62, 150, 500, 505, 960, 1835])
    fig = plots.thickness_trend_figure(rows, {"film_thickness": {"min": 475, "max": 525}})
    fig.canvas.draw()
    notes = {t.get_text(): t for t in fig.axes[0].texts}
    r = fig.canvas.get_renderer()
    above = notes["spec max 525"].get_window_extent(r)
    below = notes["spec min 475"].get_window_extent(r)
    assert below.y1 <= above.y0


def test_histogram_counts_only_finished_fits():
    rows = rows_for([490, 495, 500, 505, 510, 600], failed=[5])
    rows.append({"file": "nan.csv", "status": "ok", "film_thickness": None})
    fig = plots.thickness_histogram_figure(rows, {"film_thickness": Limit(target=500, tol=20)})
    ax = fig.axes[0]
    assert sum(p.get_height() for p in ax.patches) == 5
    assert "N = 5" in ax.get_title(loc="left")
    assert sorted(ln.get_xdata()[0] for ln in ax.lines) == [480, 520]


def test_overlay_subsamples_and_colours_by_batch_order():
    wl = np.linspace(400, 800, 30)
    curves = [{"wavelength_nm": wl, "n": np.full(30, 2 + i / 1000), "k": np.zeros(30)}
              for i in range(250)]
    fig = plots.nk_overlay_figure(curves, max_curves=40)
    axn = fig.axes[0]
    assert len(axn.lines) == 40
    assert "250 spectra" in fig.get_suptitle() and "40 shown" in fig.get_suptitle()
    assert axn.lines[0].get_ydata()[0] == 2.0 and axn.lines[-1].get_ydata()[0] == 2.249
    assert len(fig.axes) == 3                                  # n, κ and the colour bar


@pytest.mark.parametrize("lim,expect", [
    ({"min": 1, "max": 2}, (1, 2)), ({"min": 1}, (1, None)), ({"max": 2}, (None, 2)),
    ({"target": 500, "tol": 25}, (475, 525)), (Limit(target=10, tol=1), (9, 11)),
    (Limit(max=3.0), (None, 3.0))])
def test_spec_bounds(lim, expect):
    assert plots.spec_bounds({"q": lim}, "q") == expect
    assert plots.spec_bounds({"q": lim}, "other") == (None, None)


def test_row_status_and_thickness_key():
    assert plots.row_ok({}) and plots.row_ok({"status": "OK"})
    assert not plots.row_ok({"status": "failed"}) and not plots.row_ok({"status": "skipped"})
    assert plots.row_thickness_key([{"top_thickness": 1}]) == "top_thickness"
    assert plots.row_thickness_key([{"a": 1}, {"film_thickness": 2}]) == "film_thickness"
