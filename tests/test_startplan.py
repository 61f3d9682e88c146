"""The automatic start's plan, step by step (fitting/startplan.py).

Spectra come from the independent ``tmm`` package through ``validation.synth``
(published n, κ; Malitson's fused silica), never from Pellucid's own optics.
"""

import numpy as np
import pytest

from fitting.fit import FitOptions
from fitting.objective import STAGES, Objective, build_part, stage_span
from fitting.presets import default_stack
from fitting.spectrum import Spectrum
from fitting.startplan import (Film, index_levels, plan_starts, scan_windows, seed_and_edge,
                               stage_plan)
from validation.materials import material, substrate
from validation.synth import Instrument, grid, measure

FS = substrate("fused_silica")


def _objective(key, d, model, sub="fused_silica", rng=(400.0, 1100.0, 2.0)):
    wl = grid(*rng)
    T, _ = measure(material(key), d, substrate(sub), wl, Instrument(noise=0.002), 5)
    stack = default_stack(model, sub)
    opts = FitOptions()
    return Objective([build_part(0, Spectrum(wl, T), stack, opts)], opts)


def _film(obj):
    part = obj.parts[0]
    return Film("film_thickness", 0, part, part.stack.layers[0],
                dict((loc, g) for g, loc in part.names))


def test_progress_shares_of_an_automatic_fit_add_up_and_follow_each_other():
    assert sum(share for *_, share in STAGES) == pytest.approx(1.0)
    ends = [stage_span(k)[2] for k, *_ in STAGES]
    assert ends == sorted(ends) and ends[-1] == pytest.approx(1.0)
    # the i-th of n runs of a stage are consecutive slices of it
    spans = [stage_span("fringe", i, 4)[1:] for i in range(4)]
    assert all(a[1] == pytest.approx(b[0]) for a, b in zip(spans, spans[1:]))


def test_faint_fringes_get_a_ladder_of_index_levels_on_both_sides_of_the_substrate():
    # SiO2 (Lemarchand 2013) on N-BK7 (SCHOTT): index contrast about 0.05.
    obj = _objective("SiO2", 800.0, "cauchy", "n_bk7")
    part = obj.parts[0]
    sub_n = part.stack.substrate.N(part.wl).real
    seed, _ = seed_and_edge(part, sub_n)
    lv = index_levels(obj, _film(obj), seed, sub_n, np.full(part.wl.size, 1.5))
    assert lv.low_contrast
    n_s = float(np.interp(lv.wl_ref, part.wl, sub_n))
    levels = np.asarray(lv.n_try)
    assert (levels < n_s).sum() >= 3 and (levels > n_s).sum() >= 3
    assert np.min(np.abs(levels - n_s)) >= 0.015       # never the substrate's own index


def test_a_clear_high_index_film_scans_around_its_seed():
    # Ta2O5 (Gao 2012), 600 nm on fused silica: clear contrast, one level around the seed.
    obj = _objective("Ta2O5", 600.0, "cauchy")
    part = obj.parts[0]
    sub_n = part.stack.substrate.N(part.wl).real
    seed, _ = seed_and_edge(part, sub_n)
    lv = index_levels(obj, _film(obj), seed, sub_n, np.full(part.wl.size, 2.1))
    assert not lv.low_contrast and np.ndim(lv.n_try) == 0
    assert lv.n_try == pytest.approx(2.15, abs=0.1)     # Gao's n in the visible


def test_many_fringes_scan_part_of_them_first_then_all():
    # Ta2O5 3 µm: 12 or more extrema, so the scan sees half (in wavenumber) first.
    obj = _objective("Ta2O5", 3000.0, "cauchy", rng=(450.0, 1100.0, 1.0))
    part = obj.parts[0]
    sub_n = part.stack.substrate.N(part.wl).real
    seed, edge = seed_and_edge(part, sub_n)
    assert seed.n_extrema >= 12
    wins = scan_windows(part, seed, edge, 0.0, np.full(part.wl.size, 2.1))
    assert len(wins) >= 2
    first, last = wins[0], wins[-1]
    assert first[0] > max(last[0], float(part.wl.min()))   # the long side, a part only


def test_absorbing_film_holds_its_edge_during_the_fringe_stages():
    # a-Si (Pierce & Spicer 1972), 1 µm: Tauc-Lorentz gap and broadening wait.
    obj = _objective("a-Si", 1000.0, "tauc_lorentz")
    film = _film(obj)
    stages, fixed = stage_plan(obj, film, film.local(obj.params.valuesdict()),
                               [(700.0, np.inf)], 1000.0)
    assert set(fixed) == {"film_o1_Eg", "film_o1_C"}
    assert stages and (stages[0] is None or not stages[0][0].all())


def test_plan_with_no_fitted_thickness_is_one_local_start():
    obj = _objective("Ta2O5", 300.0, "cauchy")
    obj.hold("film_thickness")
    info = {}
    plan = plan_starts(obj, obj.params.valuesdict(), info)
    assert [label for label, _ in plan.starts] == ["start values"] and not plan.stages
    assert "no film thickness is fitted" in info["scan"]


def test_plan_of_an_ordinary_film_holds_the_right_order_among_its_starts():
    obj = _objective("Ta2O5", 600.0, "cauchy")
    plan = plan_starts(obj, obj.params.valuesdict(), {})
    ds = [v["film_thickness"] for _, v in plan.starts]
    assert 1 <= len(ds) <= 4
    assert min(abs(d - 600.0) for d in ds) < 0.05 * 600.0


def test_faint_fringes_scan_past_a_seed_made_thin_by_missed_extrema():
    # SiO2 on fused silica (Malitson 1965 for both; Δn ≈ 0.015): T swings by about
    # 0.1 %, at the noise. The fringe seed sees only part of the extrema and says a
    # third of the thickness; the scan must still reach the true 1000 nm basin.
    wl = grid(250.0, 1100.0, 2.0)
    T, _ = measure(material("SiO2"), 1000.0, FS, wl, Instrument(noise=0.002), 5)
    stack = default_stack("cauchy", "fused_silica")
    opts = FitOptions()
    obj = Objective([build_part(0, Spectrum(wl, T), stack, opts)], opts)
    info: dict = {}
    plan_starts(obj, obj.params.valuesdict(), info)
    lo, hi = info["scan"]["thickness_range_nm"]
    assert info.get("low_contrast") and hi >= 1100.0
    if info["seed"]["has_fringes"]:
        assert hi >= 3 * info["seed"]["thickness_nm"]
