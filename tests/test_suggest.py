"""Model suggestion (fitting/suggest.py) on spectra made outside the project.

Spectra come from the ``validation`` package: the independent ``tmm`` package
(S. J. Byrnes, arXiv:1603.02720) with published optical constants, each
source named beside its test, and ordinary instrument errors. Grids are
coarse (4-8 nm) to keep the suite fast; a suggestion fits 3-4 models.
"""

import dataclasses
import json
import math
import threading
from types import SimpleNamespace

import numpy as np
import pytest


from fitting import suggest
from fitting.dispersion import Cauchy
from fitting.errors import FitError
from fitting.presets import default_stack, make_model, tie_roughness
from fitting.spectrum import Spectrum
from fitting.stack import Layer, Stack
from fitting.substrates import library_substrate
from fitting.suggest import (FAMILIES, Candidate, add_model_choice,
                             candidate_stack, classify, evidence_words, falloff_start,
                             lossless_floor, suggest_model)
from validation.materials import Material, material, substrate
from validation.synth import Instrument, grid, measure, transmittance

ORDINARY = Instrument(scale=1.005, tilt=0.002, noise=0.002)


def _spectrum(key, d_nm, wl, instrument=ORDINARY, seed=11):
    T, _ = measure(material(key), d_nm, substrate("fused_silica"), wl, instrument, seed)
    return Spectrum(wl, T, name=f"{key}-{d_nm:g}")


def _bic_by_hand(s, c):
    """BIC = χ²/ĉ + k ln N (Schwarz 1978), recomputed from the candidate's fit alone."""
    r = c.result
    return r.chisqr / s.c_hat + r.nvarys * math.log(r.ndata)


def _check_ranking(s):
    ranked = s.ranking()
    assert ranked, "no candidate was ranked"
    redchis = [c.result.redchi for c in ranked]
    assert s.c_hat == pytest.approx(max(1.0, min(redchis)))
    for c in ranked:
        assert c.bic == pytest.approx(_bic_by_hand(s, c), rel=1e-12)
        assert c.k == c.result.nvarys
    assert [c.bic for c in ranked] == sorted(c.bic for c in ranked)
    assert ranked[0].delta_bic == 0.0
    chosen = s.chosen_candidate
    assert s.reason.startswith(chosen.label)
    others = [c for c in ranked if c is not chosen]
    if others and chosen is ranked[0] and others[0].bic - chosen.bic >= 2:
        margin = others[0].bic - chosen.bic
        shown = f"{margin:.1f}" if margin < 10 else f"{margin:.0f}"
        assert f"by {shown} over {others[0].label}" in s.reason
        assert evidence_words(margin) in s.reason


# ---------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def hfo2():
    # HfO2 film: Cauchy coefficients of M. F. Al-Kuhaili, Opt. Mater. 27, 383 (2004);
    # transparent over 400-1100 nm. 500 nm on 1 mm fused silica (Malitson 1965).
    sp = _spectrum("HfO2", 500.0, grid(400.0, 1100.0, 5.0))
    seen = []
    s = suggest_model(sp, default_stack("cauchy", "fused_silica"), progress=seen.append)
    return sp, s, seen


def test_a_transparent_dielectric_gets_a_transparent_model(hfo2):
    _, s, _ = hfo2
    assert s.appearance.traits == ("transparent",)
    assert {c.model for c in s.candidates} == set(FAMILIES["transparent"])
    assert s.chosen in FAMILIES["transparent"]
    assert not s.stopped
    _check_ranking(s)
    # The chosen model recovers the film (issue 11's criterion: thickness within 1 %).
    assert s.result.thickness()[0] == pytest.approx(500.0, rel=0.01)
    assert s.result.verdict != "poor"


def test_progress_runs_over_all_candidates(hfo2):
    _, s, seen = hfo2
    fractions = [p.fraction for p in seen]
    assert all(0.0 <= f <= 1.0 for f in fractions)
    assert seen[-1].stage == "done" and seen[-1].fraction == 1.0
    for c in s.candidates:
        assert any(m.message.startswith(c.label) for m in seen), c.label
    # Candidate k's progress stays inside its share of the bar.
    n = len(s.candidates)
    for i, c in enumerate(s.candidates):
        mine = [p.fraction for p in seen if p.message.startswith(f"{c.label} ({i + 1}/{n})")]
        assert mine and min(mine) >= i / n - 1e-12 and max(mine) <= (i + 1) / n + 1e-12


def test_the_suggestion_is_json_and_rides_in_the_result(hfo2):
    _, s, _ = hfo2
    d = json.loads(json.dumps(s.to_dict(), allow_nan=False))
    assert d["chosen"] == s.chosen and d["reason"] == s.reason
    assert [c["model"] for c in d["candidates"]] == [c.model for c in s.candidates]
    stored = s.result.extra["model_suggestion"]
    assert stored["chosen"] == s.chosen
    assert stored["candidates"][0]["verdict"] == s.candidates[0].verdict
    json.dumps(s.result.to_dict(curves=False), allow_nan=False)
    assert "->" in s.ranking_table() and s.reason in s.ranking_table()


def test_model_choice_line_is_half_the_difference_rectangular(hfo2):
    # GUM (JCGM 100:2008) 4.3.7: a rectangular distribution of half-width a has
    # u = a/√3; a is half the difference to the runner-up's thickness.
    _, s, _ = hfo2
    chosen, other = s.ranking()[0], s.ranking()[1]
    clean = {k: dataclasses.replace(u, items=tuple(i for i in u.items
                                                   if i.source != "model choice"))
             for k, u in chosen.result.uncertainty.items()}
    base = dataclasses.replace(chosen.result, uncertainty=clean)
    u = add_model_choice(base, other).uncertainty["film_thickness"]
    line = [i for i in u.items if i.source == "model choice"]
    assert len(line) == 1 and other.label in line[0].note
    d0, d1 = base.thickness()[0], other.result.thickness()[0]
    assert line[0].u == pytest.approx(abs(d1 - d0) / 2 / math.sqrt(3), rel=1e-12)
    assert u.u_combined == pytest.approx(math.sqrt(sum(i.u ** 2 for i in u.items)))
    assert add_model_choice(base, None) is base


def test_an_absorption_edge_in_range_gets_an_absorbing_model():
    # a-Si: n, κ of A. Pierce and W. E. Spicer, Phys. Rev. B 5, 3017 (1972); opaque
    # below ~600 nm, so the edge lies inside 400-1100 nm.
    sp = _spectrum("a-Si", 300.0, grid(400.0, 1100.0, 4.0))
    s = suggest_model(sp, default_stack("cauchy", "fused_silica"))
    assert "absorption edge" in s.appearance.traits
    assert s.chosen in FAMILIES["absorption edge"]
    _check_ranking(s)
    cauchy = next(c for c in s.candidates if c.model == "cauchy")
    assert cauchy.current and cauchy.delta_bic > 10          # "very strong" against Cauchy
    assert "absorption edge below" in s.reason and "Cauchy misses the data by" in s.reason
    assert s.result.thickness()[0] == pytest.approx(300.0, rel=0.05)


def test_a_transparent_conductor_gets_drude_lorentz():
    # ITO: n, κ of Minenkov et al. 2024 (validation/data/ito_minenkov2024.csv); free
    # carriers make T fall towards the infrared.
    sp = _spectrum("ITO", 110.0, grid(310.0, 1650.0, 8.0))
    s = suggest_model(sp, default_stack("cauchy", "fused_silica"))
    assert "free-carrier fall-off" in s.appearance.traits
    assert s.chosen == "drude_lorentz"
    _check_ranking(s)
    assert "(free carriers)" in s.reason
    assert s.result.thickness()[0] == pytest.approx(110.0, rel=0.1)


# ---------------------------------------------------------------------------------
def test_stop_after_the_first_candidate_keeps_what_finished():
    sp = _spectrum("HfO2", 300.0, grid(400.0, 1100.0, 10.0))
    stop = threading.Event()

    def progress(p):
        if " (2/" in p.message:
            stop.set()             # the second candidate has started

    s = suggest_model(sp, default_stack("cauchy", "fused_silica"), progress=progress,
                      stop=stop)
    assert s.stopped
    assert [c.model for c in s.ranking()] == ["cauchy"]
    second = [c for c in s.candidates if not c.ranked]
    assert len(second) == 1 and second[0].result.aborted     # no third one started
    assert s.chosen == "cauchy" and s.result is not None
    planned = len(s.appearance.families) + ("cauchy" not in s.appearance.families)
    assert planned > 2
    assert s.reason.startswith(f"stopped after 1 of {planned} candidates")


def test_stop_before_start_fits_nothing_else():
    sp = _spectrum("HfO2", 300.0, grid(400.0, 1100.0, 10.0))
    stop = threading.Event()
    stop.set()
    s = suggest_model(sp, default_stack("cauchy", "fused_silica"), stop=stop)
    assert s.stopped and len(s.candidates) == 1 and not s.ranking()
    assert s.chosen == "cauchy" and s.result.aborted


def test_families_can_be_given_and_are_checked():
    sp = _spectrum("HfO2", 300.0, grid(400.0, 1100.0, 10.0))
    s = suggest_model(sp, default_stack("cauchy", "fused_silica"), families=["sellmeier"])
    assert [c.model for c in s.candidates] in (["cauchy", "sellmeier"],
                                               ["sellmeier", "cauchy"])
    with pytest.raises(FitError, match="'tabulated' cannot be tried"):
        suggest_model(sp, default_stack(), families=["tabulated"])
    with pytest.raises(FitError, match="layer 'top' is not in the stack"):
        suggest_model(sp, default_stack(), layer="top")


# ---------------------------------------------------------------------------------
# The rules, on candidates whose BIC and verdict are set by hand
def _cand(model, bic, k, verdict, current=False):
    res = SimpleNamespace(verdict_reasons=(f"{model} is off: reasons.",), success=True,
                          used=np.ones(3, bool), wavelength_nm=np.arange(3.0),
                          residuals=np.zeros(3))
    return Candidate(model, suggest._short(model), current, res, bic=bic, k=k,
                     verdict=verdict, ranked=True)


def _decide(cands, traits=("transparent",)):
    """(chosen, runner-up, rule, reason) for hand-made candidates."""
    chosen, runner, how = suggest._choose(cands)
    return chosen, runner, how, suggest._reason(chosen, runner, how, cands,
                                                suggest.Appearance(traits, ()), 1.0)


def test_a_poor_fit_is_passed_over_for_a_usable_one():
    a, b = _cand("tauc_lorentz", 100.0, 9, "poor"), _cand("cauchy", 130.0, 7, "check")
    chosen, runner, how, text = _decide([a, b])
    assert chosen is b and runner is a and how == "poor passed over"
    assert "its fit is poor" in text and "by 30" in text


def test_a_check_yields_to_a_good_fit_unless_the_evidence_is_very_strong():
    a, b = _cand("sellmeier", 100.0, 6, "check"), _cand("cauchy", 106.0, 7, "good")
    chosen, runner, how, text = _decide([a, b])
    assert chosen is b and runner is a and how == "check passed over"
    assert "needs checking" in text and "by 6.0" in text and "strong evidence" in text
    # Very strong evidence (ΔBIC >= 10, Kass & Raftery 1995) keeps the lower BIC.
    c = _cand("cauchy", 110.5, 7, "good")
    assert suggest._choose([a, c])[0] is a


def test_indistinguishable_models_give_the_simpler_one():
    # Kass & Raftery (1995): ΔBIC 0-2 is "not worth more than a bare mention".
    a, b = _cand("cauchy_urbach", 100.0, 9, "good"), _cand("cauchy", 101.5, 7, "good")
    chosen, runner, how, text = _decide([a, b])
    assert chosen is b and how == "indistinguishable"
    assert "not distinguishable" in text and "simpler" in text
    # Among indistinguishable ones, n and κ that obey Kramers-Kronig come first.
    kk_bad = _cand("cauchy_urbach", 100.0, 8, "check")
    kk_bad.result.kk = {"film": SimpleNamespace(consistent=False)}
    kk_good = _cand("tauc_lorentz", 100.7, 9, "check")
    kk_good.result.kk = {"film": SimpleNamespace(consistent=True)}
    chosen, runner, how, text = _decide([kk_bad, kk_good], ("absorption edge",))
    assert chosen is kk_good and how == "indistinguishable"
    assert "Kramers-Kronig" in text
    # ... but 2 or more apart, the lower BIC wins whatever its size.
    c = _cand("cauchy", 102.5, 7, "good")
    assert suggest._choose([a, c])[0] is a


def test_when_every_candidate_is_poor_the_reason_says_so():
    a, b = _cand("tauc_lorentz", 100.0, 9, "poor"), _cand("cauchy", 500.0, 7, "poor")
    chosen, runner, how, text = _decide([a, b])
    assert chosen is a and how == "all poor"
    assert "no candidate describes the data well" in text


@pytest.mark.parametrize("delta, words", [(1.0, "not worth more than a bare mention"),
                                          (4.0, "positive"), (8.0, "strong"),
                                          (25.0, "very strong")])
def test_evidence_words_follow_kass_and_raftery(delta, words):
    # R. E. Kass and A. E. Raftery, J. Am. Stat. Assoc. 90, 773 (1995), sec. 3.2.
    assert evidence_words(delta) == words


# ---------------------------------------------------------------------------------
# Reading the data
def test_lossless_floor_is_the_quarter_wave_transmittance():
    # A lossless quarter-wave film of n = 2.7 on a thick slab, from tmm (Byrnes), against
    # the closed form (Macleod, Thin-Film Optical Filters, ch. 2; incoherent back face).
    s, n, lam = 1.46, 2.7, 600.0

    def const(N):
        return Material("c", "constant", "test", (100.0, 5000.0),
                        lambda w: np.full(w.shape, N, dtype=complex))

    T = transmittance(const(n), lam / (4 * n), const(s), [lam])[0]
    assert lossless_floor(np.array([s]), n)[0] == pytest.approx(T, abs=1e-12)


def test_free_carrier_fall_off_is_seen_only_where_it_is():
    wl = grid(310.0, 1650.0, 5.0)
    ito = _spectrum("ITO", 250.0, wl)
    sub = substrate("fused_silica").N(wl).real
    start = falloff_start(wl, ito.values, np.full(wl.size, 0.002), sub)
    assert start is not None and 600 < start < 1100
    # Titania, Sarkar et al. 2019: clear over 400-1100 nm, fringes to the end.
    wl2 = grid(400.0, 1100.0, 2.0)
    tio2 = _spectrum("TiO2", 1000.0, wl2)
    assert falloff_start(wl2, tio2.values, np.full(wl2.size, 0.002),
                         substrate("fused_silica").N(wl2).real) is None


def test_a_thin_film_without_fringes_is_not_called_absorbing():
    # 50 nm titania (Sarkar 2019) shows no fringe in 400-1100 nm: its own quarter-wave
    # dip must not pass for an absorption edge.
    sp = _spectrum("TiO2", 50.0, grid(400.0, 1100.0, 4.0))
    a = classify(sp, default_stack("cauchy", "fused_silica"))
    assert a.traits == ("undetermined",)
    assert set(FAMILIES["transparent"]) < set(a.families) and "tauc_lorentz" in a.families


# ---------------------------------------------------------------------------------
# Candidate stacks
def test_candidate_stack_keeps_everything_but_the_model():
    st = default_stack("cauchy", "n_bk7")
    st.layers[0].thickness = st.layers[0].thickness.copy(value=321.0, min=100.0, max=900.0)
    new = candidate_stack(st, 0, "tauc_lorentz")
    assert new.layers[0].thickness == st.layers[0].thickness
    assert new.substrate.to_dict() == st.substrate.to_dict()
    assert new.layers[0].material.to_dict() == make_model("tauc_lorentz").to_dict()
    assert st.layers[0].material.kind == "cauchy"            # the input is untouched


def test_a_roughness_layer_follows_the_new_model():
    film = Layer("film", Cauchy(), 400.0)
    rough = Layer("rough", make_model("roughness", host=film.material), 10.0)
    tie_roughness(rough, film)
    st = Stack([rough, film], library_substrate("fused_silica", 1.0))
    new = candidate_stack(st, 1, "sellmeier")
    host = new.layers[0].material.params
    assert host["host_B1"].expr == "film_B1" and "host_A" in host and "host_C" not in host
    # The suggestion picks the film, not the roughness layer, by default.
    assert suggest._target_layer(st, None) == 1


def test_a_tie_to_the_film_model_is_refused_by_name():
    a, b = Layer("a", Cauchy(), 300.0), Layer("b", Cauchy(), 300.0)
    b.material.params["A"] = b.material.params["A"].copy(expr="a_A", vary=False)
    st = Stack([a, b], library_substrate("fused_silica", 1.0))
    with pytest.raises(FitError, match="'b_A' is tied to the film's model"):
        candidate_stack(st, 0, "sellmeier")


def test_fits_out_of_budget_are_ranked_but_never_recommended_as_good():
    # Every candidate runs out of its evaluation budget: each result is "poor"
    # (fitting.verdict), ranked all the same, and the reason says none fits.
    from fitting.fit import FitOptions
    sp = _spectrum("HfO2", 300.0, grid(400.0, 1100.0, 10.0))
    s = suggest_model(sp, default_stack("cauchy", "fused_silica"), FitOptions(max_nfev=30))
    assert not s.stopped and len(s.ranking()) == len(s.candidates)
    assert all(c.result.aborted and c.verdict == "poor" for c in s.candidates)
    assert "no candidate describes the data well" in s.reason
    _check_ranking(s)
