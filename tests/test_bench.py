"""Smoke test of ``python -m fitting.bench`` in its quick mode (structure, not speed).

No timing is asserted anywhere (speed is measured by the benchmark itself). The
agreement check is exercised both ways: the engine against the independent
reference ``tmm`` (S. J. Byrnes, arXiv:1603.02720), and a reference shifted
by 1e-6 that the check must reject.
"""

import argparse
import json
import math
import sys

import numpy as np
import pytest

from fitting import bench
from fitting.dispersion import Constant
from fitting.stack import Stack
from fitting.substrates import Substrate



@pytest.fixture(scope="module")
def quick_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("bench") / "results.json"
    code = bench.main(["--quick", "--skip-batch", "--out", str(out)])
    return code, json.loads(out.read_text(encoding="utf-8"))


def test_quick_run_writes_the_documented_json(quick_run):
    code, res = quick_run
    assert code == 0
    assert res["quick"] is True
    m = res["machine"]
    for key in ("platform", "cpu_model", "cpu_count", "numpy", "scipy", "blas", "env"):
        assert key in m
    assert "OPENBLAS_CORETYPE" in m["env"]
    assert res["batch"] == {"skipped": "--skip-batch"}
    assert res["settings"]["repeat"] == bench._QUICK["repeat"]


def test_forward_rows_cover_every_case_and_agree_with_tmm(quick_run):
    _, res = quick_run
    rows = res["forward"]
    sizes = bench._QUICK["forward_sizes"]
    cases = {(r["films"], r["angle_deg"]) for r in rows}
    assert cases == {(1, 0.0), (3, 0.0), (1, 45.0)}
    assert sorted({r["wavelengths"] for r in rows}) == list(sizes)
    for r in rows:
        assert r["pellucid"]["median_s"] > 0 and r["pellucid"]["n"] == bench._QUICK["repeat"]
        assert r["tmm"]["median_s"] > 0
        assert r["speedup"] == pytest.approx(r["tmm"]["median_s"] / r["pellucid"]["median_s"])
        assert r["max_abs_dT"] < bench.AGREEMENT_TOL and r["agree"] is True
    assert res["all_agree"] is True


def test_scaling_reports_slopes_over_the_requested_sizes(quick_run):
    _, res = quick_run
    sc = res["scaling"]
    assert [r["wavelengths"] for r in sc["wavelengths"]] == list(bench._QUICK["scaling_sizes"])
    assert [r["layers"] for r in sc["layers"]] == list(bench._QUICK["scaling_layers"])
    for key in ("slope_loglog_wavelengths", "slope_loglog_layers", "per_layer_s"):
        assert math.isfinite(sc[key])


def test_fit_section_is_measured_or_says_why_not(quick_run):
    _, res = quick_run
    f = res["fit"]
    if "skipped" in f:
        assert "fit engine" in f["skipped"]
    else:
        assert len(f["runs"]) == f["seeds"] == bench._QUICK["fit_seeds"]
        assert f["median_wall_s"] > 0 and f["median_nfev"] > 0


def test_agreement_check_rejects_a_disagreeing_reference(monkeypatch):
    real = bench.tmm_RT

    def shifted(*args, **kw):
        R, T = real(*args, **kw)
        return R, T + 1e-6

    monkeypatch.setattr(bench, "tmm_RT", shifted)
    rows = bench.bench_forward((12,), repeat=2, tmm_repeat=1)
    assert all(r["agree"] is False for r in rows)
    assert all(r["max_abs_dT"] == pytest.approx(1e-6, rel=1e-3) for r in rows)


def test_reference_wrapper_gives_the_bare_slab_transmittance():
    # Lossless incoherent slab with both faces: T = 2s/(s² + 1) = 0.923077 for s = 1.5
    # (Swanepoel 1983, J. Phys. E 16, 1214, eq. 3), here through tmm.inc_tmm.
    st = Stack([], Substrate(Constant(1.5), 1.0))
    R, T = bench.tmm_RT(st, np.array([500.0, 700.0]))
    assert T == pytest.approx(2 * 1.5 / (1.5 ** 2 + 1), abs=1e-12)
    assert R + T == pytest.approx(1.0, abs=1e-12)


def test_subprocess_runner_samples_the_memory_of_the_process_tree(tmp_path):
    pytest.importorskip("psutil")
    # A child that holds ~60 MB for a moment must show up in the sampled peak.
    code = "import time; b = bytearray(60 * 2**20); b[::4096] = b'x' * len(b[::4096]); " \
           "time.sleep(0.3)"
    run = bench._run_sampled([sys.executable, "-c", code], tmp_path)
    assert run["returncode"] == 0 and run["wall_s"] >= 0.3
    assert run["peak_tree_rss_bytes"] > 60 * 2 ** 20


def test_series_summary_reports_slope_and_per_spectrum_ratio():
    # Wall time 2 s + 0.5 s per spectrum: exactly linear, so the fit recovers both
    # and the per-spectrum time at 200 vs 50 is (2/200 + 0.5)/(2/50 + 0.5).
    runs = [{"spectra": n, "wall_s": 2 + 0.5 * n, "returncode": 0,
             "peak_tree_rss_bytes": 100 * 2 ** 20, "spectra_per_s": n / (2 + 0.5 * n)}
            for n in (50, 100, 200)]
    out = bench._series_summary(runs, (50, 100, 200))
    assert out["seconds_per_spectrum_slope"] == pytest.approx(0.5)
    assert out["startup_s"] == pytest.approx(2.0)
    assert out["per_spectrum_ratio_last_first"] == pytest.approx((2 / 200 + 0.5) / (2 / 50 + 0.5))
    assert out["peak_tree_rss_mb"] == pytest.approx(100)
    assert out["all_fits_ok"] is True
    crashed = runs[:2] + [{**runs[2], "returncode": 2}]
    assert "failed" in bench._series_summary(crashed, (50, 100, 200))


def test_series_summary_slopes_and_memory_of_a_growing_batch():
    # Per-spectrum time growing with the batch (0.5 s + 0.001 s per spectrum already in
    # the batch) must show in the upper log-log slope; flat memory gives a ratio of 1.
    runs = [{"spectra": n, "wall_s": 2 + 0.5 * n + 0.001 * n * n, "returncode": 0,
             "peak_tree_rss_bytes": 300 * 2 ** 20, "spectra_per_s": 1.0}
            for n in (10, 100, 1000)]
    out = bench._series_summary(runs, (10, 100, 1000))
    expected = math.log((2 + 500 + 1000) / (2 + 50 + 10)) / math.log(10)
    assert out["slope_loglog_upper"] == pytest.approx(expected)
    assert out["slope_loglog_upper"] > 1.05              # the target would flag this
    assert out["peak_rss_ratio_last_first"] == pytest.approx(1.0)
    # A run ending in exit status 3 (fitted, some verdicts to check) still counts.
    runs[1]["returncode"] = 3
    assert "failed" not in bench._series_summary(runs, (10, 100, 1000))


def test_batch_counts_option_and_batch_only_report(capsys):
    assert bench._counts("10,100,2000") == (10, 100, 2000)
    for bad in ("10,x", "0,5", ""):
        with pytest.raises(argparse.ArgumentTypeError):
            bench._counts(bad)
    fake = {"machine": {"cpu_model": "test cpu", "cpus_usable": 2, "numpy": "x", "scipy": "y",
                        "python": "3"},
            "forward": [], "scaling": {"skipped": "--batch-only"}, "fit": {"skipped": "x"},
            "batch": {"inputs": "demo recipe", "jobs": 2, "exports": ["nk"],
                      "runs": [{"spectra": 10, "wall_s": 5.0, "spectra_per_s": 2.0,
                                "seconds_per_spectrum": 0.5, "peak_tree_rss_bytes": 2 ** 28,
                                "peak_main_rss_bytes": 2 ** 27}],
                      "reference_s_per_spectrum_one_process": 0.4, "efficiency": 0.4,
                      "reference_inputs": 7},
            "targets": {"batch_at_least_10_spectra_per_s": {"value": 2.0, "met": False}},
            "agreement_tol": 1e-9, "all_agree": True, "total_s": 1.0}
    text = bench.format_report(fake)
    assert "Forward model" not in text
    assert "256 / 128" in text and "efficiency 40%" in text and "NOT met" in text
    assert "mean over the 7 distinct input spectra" in text
