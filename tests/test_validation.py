"""The validation set (``validation/``): its generator, its published data and the engine on it.

The generator is checked against closed forms that owe nothing to ``tmm`` or to
the project (sources beside each check); the data tables against values
printed in their sources; the last test fits the ``--quick`` cases from the
app's defaults and asks for zero silent failures (issue 11).
"""

import ast
import math
from pathlib import Path

import numpy as np
import pytest


from validation import cases as vcases
from validation.materials import DATA_DIR, MATERIALS, SUBSTRATES, Material, read_table
from validation.run import _judge, format_table, run, summarise
from validation.synth import (Instrument, averaged_transmittance, gauss_hermite_nodes,
                              grid, measure, transmittance)

ROOT = Path(__file__).resolve().parents[1]


def _const(N) -> Material:
    """A dispersion-free test material (not published data: for closed-form checks only)."""
    return Material("const", "constant index", "test", (100.0, 5000.0),
                    lambda w: np.full(w.shape, N, dtype=complex))


# ---------------------------------------------------------------------------------
# (a) the generator against closed forms
def test_bare_lossless_slab_is_2s_over_s2_plus_1():
    # Incoherent lossless slab in air, both faces and all multiple reflections:
    # T = 2s/(s² + 1) (R. Swanepoel, J. Phys. E 16, 1214 (1983), transparent-substrate
    # transmission). s = 1.4585 is the handbook n_d of fused silica (Malitson 1965).
    s = 1.4585
    wl = np.array([400.0, 587.6, 900.0])
    T = transmittance(_const(1.0), 100.0, _const(s), wl)   # an "air film" is no film
    assert T == pytest.approx(np.full(3, 2 * s / (s * s + 1)), abs=1e-12)
    assert 2 * s / (s * s + 1) == pytest.approx(0.93278, abs=1e-5)


def _swanepoel_T(n, k, s, d, wl):
    """Swanepoel (1983) eq. 1: T = Ax / (B - Cx cos φ + Dx²) for a film on a thick slab."""
    x = np.exp(-4 * np.pi * k / wl * d)
    phi = 4 * np.pi * n * d / wl
    A = 16 * n * n * s
    B = (n + 1) ** 3 * (n + s * s)
    C = 2 * (n * n - 1) * (n * n - s * s)
    D = (n - 1) ** 3 * (n - s * s)
    return A * x / (B - C * x * np.cos(phi) + D * x * x)


def test_film_on_thick_substrate_matches_swanepoel_eq1():
    # R. Swanepoel, J. Phys. E 16, 1214 (1983), eq. 1 (film of index n - iκ on a thick
    # transparent substrate s, back face included). Exact for κ = 0; for κ > 0 it drops
    # κ from the interface coefficients, an error of first order in κ.
    wl = np.linspace(400.0, 1000.0, 7)
    n, s, d = 2.2, 1.52, 700.0
    exact = transmittance(_const(n), d, _const(s), wl)
    assert exact == pytest.approx(_swanepoel_T(n, 0.0, s, d, wl), abs=1e-12)
    weak = transmittance(_const(n + 1e-4j), d, _const(s), wl)
    assert np.max(np.abs(weak - _swanepoel_T(n, 1e-4, s, d, wl))) < 5e-5
    assert np.max(np.abs(weak - exact)) > 1e-3       # absorption really is in the model


def test_quarter_wave_film_transmittance():
    # Quarter-wave layer: R = ((s - n²)/(s + n²))² at λ0 = 4nd (H. A. Macleod, Thin-Film
    # Optical Filters, ch. 2); the incoherent back face adds T = T1 T2 / (1 - R1 R2)
    # (O. S. Heavens, Optical Properties of Thin Solid Films, 1955).
    n, s, lam0 = 2.0, 1.52, 600.0
    R = ((s - n * n) / (s + n * n)) ** 2
    Rs = ((s - 1) / (s + 1)) ** 2
    expected = (1 - R) * (1 - Rs) / (1 - R * Rs)
    T = transmittance(_const(n), lam0 / (4 * n), _const(s), [lam0])
    assert T[0] == pytest.approx(expected, abs=1e-12)


def test_mirror_index_gives_the_same_quarter_wave_transmittance():
    # R of a quarter-wave layer, ((s - n²)/(s + n²))² (Macleod, ch. 2), is unchanged by
    # n -> s/n: the "mirror" solution of a low-index film on higher-index glass that the
    # SiO2-on-N-BK7 and MgF2 cases probe. Checked on the generator at λ0 = 4nd.
    s, n, lam0 = 1.515, 1.38, 600.0
    T = transmittance(_const(n), lam0 / (4 * n), _const(s), [lam0])[0]
    T_mirror = transmittance(_const(s / n), lam0 / (4 * s / n), _const(s), [lam0])[0]
    assert T == pytest.approx(T_mirror, abs=1e-12)
    assert T > 2 * s / (s * s + 1) + 0.01        # and differs from the bare glass


def test_s_and_p_coincide_at_normal_incidence():
    # The generator uses the s result as the unpolarised one; at normal incidence the two
    # polarisations are the same physical wave (common practice; checked with tmm here).
    import tmm
    args = ([1.0, 2.1 + 0.01j, 1.5, 1.0], [np.inf, 350.0, 1e6, np.inf], ["i", "c", "i", "i"],
            0.0, 555.0)
    assert tmm.inc_tmm("s", *args)["T"] == pytest.approx(tmm.inc_tmm("p", *args)["T"],
                                                          abs=1e-14)


def test_gauss_hermite_average_matches_brute_force():
    # Gaussian thickness distribution, 3 % on a 1 µm high-index film (the hardest case in
    # the set): quadrature against a 2001-point average over ±6σ.
    film, sub = MATERIALS["TiO2"], SUBSTRATES["fused_silica"]
    wl = np.array([400.0, 430.0, 700.0])
    gh = averaged_transmittance(film, 1000.0, sub, wl, 0.03)
    z = np.linspace(-6, 6, 2001)
    w = np.exp(-z * z / 2)
    w /= w.sum()
    brute = sum(wi * transmittance(film, 1000.0 * (1 + 0.03 * zi), sub, wl)
                for zi, wi in zip(z, w))
    assert np.max(np.abs(gh - brute)) < 5e-5
    # and the spread matters at these wavelengths (fringes damped)
    assert np.max(np.abs(gh - transmittance(film, 1000.0, sub, wl))) > 0.01


def test_gauss_hermite_node_count_integrates_the_cosine():
    # E[cos(σz)] = exp(-σ²/2) for z ~ N(0,1) (Gaussian characteristic function).
    for sigma in (0.5, 3.0, 9.0):
        n = gauss_hermite_nodes(sigma, tol=1e-6)
        x, w = np.polynomial.hermite.hermgauss(n)
        approx = np.sum(w * np.cos(sigma * np.sqrt(2) * x)) / np.sqrt(np.pi)
        assert approx == pytest.approx(math.exp(-sigma ** 2 / 2), abs=1e-6)
    assert gauss_hermite_nodes(9.0) > gauss_hermite_nodes(0.5)


def test_instrument_errors_and_seeding():
    film, sub = _const(2.0), _const(1.52)
    wl = grid(400.0, 1000.0, 2.0)
    clean = transmittance(film, 500.0, sub, wl)
    m, ideal = measure(film, 500.0, sub, wl, Instrument(scale=1.01), seed=1)
    assert m == pytest.approx(1.01 * clean, abs=1e-12) and ideal == pytest.approx(clean)
    m, _ = measure(film, 500.0, sub, wl, Instrument(tilt=0.004), seed=1)
    ratio = m / clean
    assert ratio[0] == pytest.approx(0.998) and ratio[-1] == pytest.approx(1.002)
    a, _ = measure(film, 500.0, sub, wl, Instrument(noise=0.002), seed=7)
    b, _ = measure(film, 500.0, sub, wl, Instrument(noise=0.002), seed=7)
    c, _ = measure(film, 500.0, sub, wl, Instrument(noise=0.002), seed=8)
    assert np.array_equal(a, b) and not np.array_equal(a, c)
    assert np.std(a - clean) == pytest.approx(0.002, rel=0.15)
    assert grid(300.0, 1100.0, 2.0)[[0, -1]].tolist() == [300.0, 1100.0]


# ---------------------------------------------------------------------------------
# (b) the published data
# (file, wavelength nm, n, κ): rows of the source tables as printed in the
# refractiveindex.info files named in each CSV header. The first group are rows kept
# in the CSV; the second group are rows left out when the table was thinned, so they
# check the interpolation between kept rows against the original numbers.
TABLE_ROWS = [
    ("TiO2", 633.0, 2.130194, 0.0),        # Sarkar et al. 2019
    ("TiO2", 345.0, 2.628298, 0.054359),
    ("Ta2O5", 632.0, 2.135927, 0.0),       # Gao et al. 2012
    ("Nb2O5", 630.0, 2.322660, 0.0),       # Lemarchand 2013
    ("Nb2O5", 330.0, 2.909504, 0.103919),
    ("SiO2", 630.0, 1.472181, 0.0),        # Lemarchand 2013
    ("Al2O3", 640.0, 1.67689, 0.0),        # Boidin et al. 2016
    ("ZnO", 630.0, 1.7765, 0.041334),      # Aguilar et al. 2019
    ("ITO", 632.96, 1.75875, 0.01284),     # Minenkov et al. 2024
    ("ITO", 1298.10, 0.32280, 0.58525),
    ("a-Si", 619.9, 4.23, 0.461),          # Pierce & Spicer 1972 (Palik 1985)
]
LEFT_OUT_ROWS = [
    ("TiO2", 555.0, 2.161723, 0.0),
    ("TiO2", 352.0, 2.568217, 0.021243),
    ("Ta2O5", 552.0, 2.156609, 0.000019),
    ("Nb2O5", 635.0, 2.320854, 0.0),
    ("SiO2", 625.0, 1.472307, 0.0),
    ("Al2O3", 660.0, 1.67594, 0.0),
    ("ZnO", 625.0, 1.7773, 0.041858),
    ("ITO", 644.13, 1.74615, 0.01358),
]


@pytest.mark.parametrize("key, wl, n, k", TABLE_ROWS)
def test_table_rows_match_their_source(key, wl, n, k):
    N = MATERIALS[key].N([wl])[0]
    assert N.real == pytest.approx(n, abs=1e-9) and N.imag == pytest.approx(k, abs=1e-9)


@pytest.mark.parametrize("key, wl, n, k", LEFT_OUT_ROWS)
def test_thinned_tables_interpolate_the_original_rows(key, wl, n, k):
    N = MATERIALS[key].N([wl])[0]
    assert N.real == pytest.approx(n, abs=5e-5) and N.imag == pytest.approx(k, abs=2e-5)


@pytest.mark.parametrize("key, wl, n, tol, source", [
    # Al-Kuhaili 2004 Cauchy coefficients evaluated by hand at 0.5 µm:
    # 1.875 + 6.28e-3/0.25 + 5.80e-4/0.0625 = 1.875 + 0.02512 + 0.00928
    ("HfO2", 500.0, 1.90940, 1e-5, "Al-Kuhaili 2004, hand evaluation"),
    # value from memory: n ≈ 1.996 at 1550 nm for stoichiometric LPCVD Si3N4 (Luke 2015)
    ("Si3N4", 1550.0, 1.996, 1e-3, "Luke et al. 2015 (from memory)"),
    # value from memory: MgF2 n_o = 1.3777 at the sodium D line (handbook value, Dodge 1984)
    ("MgF2", 589.3, 1.3777, 3e-4, "Dodge 1984 (from memory)"),
])
def test_formula_materials(key, wl, n, tol, source):
    assert MATERIALS[key].n(wl) == pytest.approx(n, abs=tol), source


@pytest.mark.parametrize("key, wl, n, tol", [
    ("fused_silica", 587.56, 1.4585, 1e-4),   # n_d, Malitson 1965 (handbook value)
    ("n_bk7", 587.56, 1.51680, 1e-5),         # n_d, SCHOTT datasheet N-BK7
    ("sapphire_o", 587.56, 1.768, 5e-4),      # n_o(d), Malitson & Dodge 1972 (from memory)
])
def test_substrates_match_their_d_line_index(key, wl, n, tol):
    assert SUBSTRATES[key].n(wl) == pytest.approx(n, abs=tol)


def test_substrates_agree_with_the_project_library():
    # Written independently here; a typing error on either side shows up as a difference.
    from fitting.substrates import library_substrate
    wl = np.array([350.0, 633.0, 1500.0])
    for key, m in SUBSTRATES.items():
        ours = m.N(wl).real
        theirs = library_substrate(key).N(wl).real
        assert ours == pytest.approx(theirs, abs=1e-7), key


def test_data_files_are_small_cited_and_clean():
    files = sorted(DATA_DIR.glob("*.csv"))
    assert len(files) == 8
    for f in files:
        assert f.stat().st_size < 50_000, f.name
        header, wl, n, k = read_table(f)
        for field in ("material", "source", "origin", "licence", "rows"):
            assert header.get(field), f"{f.name}: header line '# {field}:' missing"
        assert "doi:10." in header["source"], f.name
        assert "CC0" in header["licence"], f.name
        assert np.all(np.diff(wl) > 0) and np.all(k >= 0) and np.all(n > 0), f.name
        assert wl[0] <= 350 and wl[-1] >= 1100, f"{f.name} must span UV-Vis-NIR"
    used = {m.table for m in MATERIALS.values() if m.table}
    assert used == {f.name for f in files}


def test_table_reader_names_file_and_line(tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("# source: x\nwavelength_nm,n,k\n400,2.0,0\n500,two,0\n")
    with pytest.raises(ValueError, match=r"bad.csv, line 4"):
        read_table(bad)


def test_cases_are_consistent_with_the_app_menus_and_the_data():
    from fitting.presets import MODEL_CHOICES, SUBSTRATE_NAMES
    cases = vcases.CASES
    assert 40 <= len(cases) <= 60 and 10 <= len(vcases.QUICK) <= 15
    for c in cases:
        assert c.model in MODEL_CHOICES and c.substrate in SUBSTRATE_NAMES, c.name
        wl = grid(*c.range_nm)
        MATERIALS[c.material].N(wl)       # raises outside the published range
        SUBSTRATES[c.substrate].N(wl)
        assert 0.98 <= c.instrument.scale <= 1.02 and abs(c.instrument.tilt) <= 0.004
        assert 0.001 <= c.instrument.noise <= 0.003 and c.instrument.spread <= 0.03
    # every material, each error kind and the corners the issue names are covered
    assert {c.material for c in cases} == set(MATERIALS)
    assert {c.errors for c in cases} >= {"scale+1", "scale-1", "tilt+", "tilt-", "spread1",
                                         "spread3", "combined"}
    assert min(c.thickness_nm for c in cases) == 50 and max(c.thickness_nm for c in cases) >= 8000
    assert any(c.material == "SiO2" and c.substrate == "n_bk7" for c in cases)
    assert vcases.select("ito") and all("ITO" in c.name for c in vcases.select("ito"))
    assert len({c.seed for c in cases}) == len(cases)


def test_generator_never_uses_the_project_engine():
    # The yardstick must be independent: only run.py (which calls the engine) imports fitting.
    for name in ("materials.py", "synth.py", "cases.py", "__init__.py"):
        tree = ast.parse((ROOT / "validation" / name).read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                mods = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                mods = [node.module or ""]
            else:
                continue
            assert not any(m.split(".")[0] in ("fitting", "app") for m in mods), name


def test_counting_of_silent_failures_and_quiet_misses():
    base = {"ordinary": True, "d_true": 500.0, "n633_true": 2.0, "verdict_source": "engine",
            "case": "x", "model": "cauchy", "generate_s": 0.0}
    rows = [_judge({**base, "case": "ok", "d_fit": 503.0, "n633_fit": 2.005, "verdict": "good",
                    "d_U": 4.0}),
            _judge({**base, "case": "quiet", "d_fit": 510.0, "n633_fit": 2.0, "verdict": "good"}),
            _judge({**base, "case": "silent", "d_fit": 400.0, "n633_fit": 2.2,
                    "verdict": "good"}),
            _judge({**base, "case": "honest", "d_fit": 400.0, "n633_fit": 2.2,
                    "verdict": "poor"}),
            _judge({**base, "case": "refused", "verdict": "refused", "ordinary": False})]
    s = summarise(rows)
    assert s["ordinary_recovered"] == 1 and s["ordinary"] == 4
    assert s["silent"] == ["silent"] and s["gross"] == ["silent", "honest"]
    assert s["quiet"] == ["quiet", "silent"] and s["refused"] == ["refused"]
    # U = 4 nm covers an error of 3 nm; a row without U is not counted either way
    assert rows[0]["covered"] is True and rows[1]["covered"] is None
    assert s["ordinary_covered"] == 1 and s["ordinary_uncovered"] == []
    assert _judge({**base, "d_fit": 503.0, "n633_fit": 2.0, "verdict": "good",
                   "d_U": 2.0})["covered"] is False
    md = format_table(rows, markdown=True).splitlines()
    assert md[0].startswith("| case |") and len(md) == 2 + len(rows)
    assert "SILENT" in md[4]


# ---------------------------------------------------------------------------------
# (c) the engine from its defaults on the quick set (issue 11)
def test_quick_set_from_the_defaults_has_no_silent_failure():
    rows = run(vcases.select(quick=True), jobs=2)
    s = summarise(rows)
    assert not s["refused"], [r.get("error") for r in rows if r["verdict"] in ("refused",
                                                                              "error")]
    assert s["silent"] == [], format_table(rows)
    assert s["ordinary_missed"] == [], format_table(rows)


def test_diagnose_fits_every_variant_from_the_same_spectrum():
    from validation.diagnose import VARIANTS, diagnose
    case = vcases.Case("Al2O3-600-diag", "Al2O3", 600, "fused_silica", (400.0, 1000.0, 4.0),
                       "noise", "cauchy", True)
    rows = diagnose(case)
    assert [r["variant"] for r in rows] == list(VARIANTS)
    assert all("error" not in r for r in rows)
    truth = rows[-1]
    # a local fit started at the truth on a clean medium-index film stays there
    assert abs(truth["dd_pct"]) < 1.0 and truth["scale"] is not None
    # the defaults fit the 100 % line scale; the bare variant does not
    assert rows[0]["scale"] is not None and rows[1]["scale"] is None
