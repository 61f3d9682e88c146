"""Known layers (fitting/known.py, Layer(known=True)): held in every fit, loaded from exports.

Reference spectra come from the independent transfer-matrix package ``tmm``
(S. J. Byrnes, "Multilayer optical calculations", arXiv:1603.02720): coherent
films on an incoherent 1 mm substrate (``tmm.inc_tmm``), never from Pellucid's
optics. Materials are published data through the ``validation`` package:
HfO2 top film, Cauchy coefficients of M. F. Al-Kuhaili, Opt. Mater. 27, 383
(2004); Al2O3 barrier, the measured n, κ table of R. Boidin et al., Ceram. Int.
42, 1177 (2016); fused silica, Sellmeier of I. H. Malitson, J. Opt. Soc. Am. 55,
1205 (1965). Noise of 0.2 % T is common practice for a grating spectrophotometer.
"""

from __future__ import annotations

import json
import shutil

import numpy as np
import pytest
import tmm

from fitting.cli import main as cli_main
from fitting.dispersion import Cauchy, Tabulated
from fitting.errors import FitError, ParameterError, RecipeError, SpectrumFormatError, \
    WavelengthRangeError
from fitting.export import export_result, make_provenance
from fitting.fit import FitOptions, fit_joint, fit_spectrum
from fitting.known import known_layer_from_export, read_nk_table
from fitting.reader import write_spectrum
from fitting.recipe import Recipe, load_recipe, recipe_from_dict, recipe_identity, save_recipe
from fitting.spectrum import Spectrum, sha256_of_file
from fitting.stack import Layer, Stack
from fitting.substrates import library_substrate

from validation.materials import material, substrate  # noqa: E402

WL = np.linspace(350.0, 1000.0, 131)
TOP, BARRIER, SUB = material("HfO2"), material("Al2O3"), substrate("fused_silica")
D_TOP, D_BARRIER = 420.0, 100.0
NOISE = 0.002


def _tmm_T(films, wl=WL, seed=0) -> Spectrum:
    """T of air | films (ambient side first, (Material, d_nm)) | 1 mm fused silica | air."""
    Ns = [m.N(wl) for m, _ in films]
    Nsub = SUB.N(wl)
    d = [float(x) for _, x in films]
    c = ["i", *["c"] * len(d), "i", "i"]
    T = np.array([tmm.inc_tmm("s", [1.0, *(N[i] for N in Ns), Nsub[i], 1.0],
                              [np.inf, *d, 1e6, np.inf], c, 0.0, w)["T"]
                  for i, w in enumerate(wl)])
    return Spectrum(wl, T + NOISE * np.random.default_rng(seed).standard_normal(wl.size),
                    name=f"tmm{seed}")


def _published_barrier_table() -> Tabulated:
    """Boidin 2016's Al2O3 n, κ on a 5 nm grid: a known layer from a handbook-style table."""
    grid = np.arange(300.0, 1105.0, 5.0)
    N = BARRIER.N(grid)
    return Tabulated(grid, N.real, N.imag, name="al2o3_boidin2016")


def _fit_top(stack, spectrum, **kw):
    return fit_spectrum(spectrum, stack, FitOptions(**kw))


@pytest.fixture(scope="module")
def barrier_export(tmp_path_factory):
    """Last week's fit of the barrier alone on fused silica, exported as a technician would."""
    out = tmp_path_factory.mktemp("week1")
    res = fit_spectrum(_tmm_T([(BARRIER, D_BARRIER)], seed=1),
                       Stack([Layer("barrier", Cauchy(), 500.0)],
                             library_substrate("fused_silica")), FitOptions())
    assert abs(res.thickness("barrier")[0] - D_BARRIER) < 0.02 * D_BARRIER
    export_result(res, out, stem="week1", provenance=make_provenance(res),
                  parts=("nk", "json"))
    return out, res


@pytest.fixture(scope="module")
def two_layer_spectrum():
    return _tmm_T([(TOP, D_TOP), (BARRIER, D_BARRIER)], seed=2)


# -- the two-layer sample: only the top film fitted -------------------------------------
@pytest.mark.parametrize("known_first", [False, True])
def test_known_barrier_from_published_table_top_film_within_1_percent(known_first):
    # known_first: the known layer faces the ambient (a known cap over the fitted film);
    # the automatic start must scan the first *fitted* film, not layer 0.
    known = Layer("barrier", _published_barrier_table(), D_BARRIER, known=True)
    film = Layer("film", Cauchy(), 500.0)        # the defaults a technician gets
    order = [known, film] if known_first else [film, known]
    spec = _tmm_T([(BARRIER, D_BARRIER), (TOP, D_TOP)] if known_first
                  else [(TOP, D_TOP), (BARRIER, D_BARRIER)], seed=3)
    res = _fit_top(Stack(order, library_substrate("fused_silica")), spec)
    d, _ = res.thickness("film")
    assert abs(d - D_TOP) < 0.01 * D_TOP, (d, res.verdict, res.verdict_reasons)
    assert res.verdict != "poor", res.verdict_reasons
    p = res.params["barrier_thickness"]
    assert p.value == D_BARRIER and not p.vary
    assert "barrier_thickness" not in res.var_names
    # n(633) of HfO2 from Al-Kuhaili's Cauchy: recovered to 0.01.
    assert abs(res.optical["film"].at(633.0)[0] - TOP.n(633.0)) < 0.01


def test_known_barrier_loaded_from_an_earlier_export(barrier_export, two_layer_spectrum):
    out, week1 = barrier_export
    path = out / "week1_nk_barrier.csv"
    layer = known_layer_from_export(path, covers_nm=two_layer_spectrum)
    # Thickness from the result JSON beside the table; provenance kept.
    assert layer.known and layer.name == "barrier"
    assert layer.thickness.value == week1.thickness("barrier")[0]
    assert layer.source["sha256"] == sha256_of_file(path)
    assert layer.source["thickness"]["from"] == "week1_result.json"
    assert layer.source["thickness"]["sha256"] == sha256_of_file(out / "week1_result.json")
    assert layer.source["thickness"]["stderr"] == pytest.approx(week1.thickness("barrier")[1])
    np.testing.assert_allclose(layer.material.n, week1.optical["barrier"].n, rtol=1e-12)
    res = _fit_top(Stack([Layer("film", Cauchy(), 500.0), layer],
                         library_substrate("fused_silica")), two_layer_spectrum)
    d, _ = res.thickness("film")
    assert abs(d - D_TOP) < 0.01 * D_TOP, (d, res.verdict_reasons)
    # The result says which known layer it stood on.
    saved = res.to_dict()["stack"]["layers"][1]
    assert saved["known"] is True and saved["source"]["sha256"] == layer.source["sha256"]
    # The known thickness's own σ is an influence quantity of this fit (GUM 5.1.2):
    # its budget line agrees with local refits of the top film, from the result, on
    # a barrier moved by ±σ (the linear propagation against the direct computation;
    # same non-uniformity and scale setting, so only the barrier moves).
    item = {i.source: i.u for i in res.uncertainty["film_thickness"].items}
    u_lin = item["barrier thickness (known)"]
    s = layer.source["thickness"]["stderr"]
    moved = []
    for sign in (+1, -1):
        st = Stack.from_dict(res.stack)
        st.layers[1].thickness = st.layers[1].thickness.copy(
            value=layer.thickness.value + sign * s)
        r2 = fit_spectrum(two_layer_spectrum, st, FitOptions(method="least_squares",
                                                             fit_spread=False))
        moved.append(abs(r2.thickness("film")[0] - d))
    assert 0.6 * np.mean(moved) <= u_lin <= 1.6 * np.mean(moved), (u_lin, moved)


def test_reused_n_k_with_only_the_thickness_fitted(barrier_export):
    # The same barrier material, now 160 nm: its table is reused and only d is fitted.
    out, _ = barrier_export
    layer = known_layer_from_export(out / "week1_nk_barrier.csv", fit_thickness=True)
    assert not layer.known and layer.thickness.vary
    res = _fit_top(Stack([layer], library_substrate("fused_silica")),
                   _tmm_T([(BARRIER, 160.0)], seed=4))
    assert abs(res.thickness("barrier")[0] - 160.0) < 0.02 * 160.0
    assert res.var_names.count("barrier_thickness") == 1


# -- every fit method holds a known layer -----------------------------------------------
def _held_stack():
    """A known barrier whose own flags all say "fit" and which holds a tie of its own;
    the top film ties its B to the barrier's (a tie pointing into a known layer)."""
    barrier = Layer("barrier", Cauchy(A=1.65, B=0.006), D_BARRIER, known=True)
    barrier.thickness.expr = "film_thickness / 4"          # suspended while known
    film = Layer("film", Cauchy(A=1.9, B=0.01), 430.0)
    film.material.params["B"].expr = "barrier_B"
    film.material.params["B"].vary = False
    return Stack([film, barrier], library_substrate("fused_silica"))


@pytest.mark.parametrize("method", ["auto", "leastsq", "least_squares",
                                    "differential_evolution", "basinhopping"])
def test_known_layer_unchanged_by_every_fit_method(method, two_layer_spectrum):
    stack = _held_stack()
    before = stack.layer("barrier").to_dict()
    spec = Spectrum(two_layer_spectrum.wavelength_nm[::3], two_layer_spectrum.values[::3])
    film_thickness = stack.layer("film").thickness
    film_thickness.min, film_thickness.max = 380.0, 460.0   # finite box for global methods
    res = fit_spectrum(spec, stack, FitOptions(method=method, max_nfev=1500,
                                               fit_spread=False))
    assert stack.layer("barrier").to_dict() == before          # flags and tie kept too
    held = {"thickness": D_BARRIER, "A": 1.65, "B": 0.006, "C": 0.0}
    for k, value in held.items():
        p = res.params[f"barrier_{k}"]
        assert not p.vary and p.value == value, (k, p)
    assert res.params["film_B"].value == 0.006                  # read the held value
    assert "film_thickness" in res.var_names
    assert res.params["film_thickness"].value != 430.0          # the fit did run


def test_known_layer_unchanged_by_a_joint_fit(two_layer_spectrum):
    s1 = Spectrum(two_layer_spectrum.wavelength_nm[::2], two_layer_spectrum.values[::2])
    s2 = _tmm_T([(TOP, 380.0), (BARRIER, D_BARRIER)], wl=s1.wavelength_nm, seed=5)
    stacks = [_held_stack(), _held_stack()]
    before = [s.layer("barrier").to_dict() for s in stacks]
    res = fit_joint([s1, s2], stacks, ["film_A", "barrier_A"], FitOptions())
    assert [s.layer("barrier").to_dict() for s in stacks] == before
    for name, p in res.params.items():
        if "barrier_" in name:
            assert not p.vary, name
    assert res.params["barrier_A"].value == 1.65
    assert {"p1_film_thickness", "p2_film_thickness"} <= set(res.var_names)


def test_a_stack_of_only_known_layers_is_refused():
    stack = Stack([Layer("barrier", Cauchy(A=1.65), D_BARRIER, known=True)],
                  library_substrate("fused_silica"))
    with pytest.raises(FitError, match="every layer is marked known"):
        fit_spectrum(_tmm_T([(BARRIER, D_BARRIER)], wl=WL[::4]), stack,
                     FitOptions(fit_scale=False, fit_tilt=False, fit_spread=False))


# -- damaged, foreign or too short tables -----------------------------------------------
def _copy(barrier_export, tmp_path, *, json_too=True):
    out, _ = barrier_export
    shutil.copy(out / "week1_nk_barrier.csv", tmp_path)
    if json_too:
        shutil.copy(out / "week1_result.json", tmp_path)
    return tmp_path / "week1_nk_barrier.csv"


def _lines(path):
    return path.read_text(encoding="utf-8").splitlines(keepends=True)


def test_cut_off_table_is_refused_with_file_and_line(barrier_export, tmp_path):
    path = _copy(barrier_export, tmp_path)
    lines = _lines(path)
    path.write_text("".join(lines[:-1]) + lines[-1][:9], encoding="utf-8")  # cut mid-row
    with pytest.raises(SpectrumFormatError, match=rf"week1_nk_barrier.csv, line {len(lines)}"
                                                  r".*cut off.*export it again"):
        known_layer_from_export(path)


def test_text_in_a_row_and_negative_n_are_refused_with_the_line(barrier_export, tmp_path):
    path = _copy(barrier_export, tmp_path, json_too=False)
    lines = _lines(path)
    row = len(lines) - 20
    damaged = lines.copy()
    damaged[row - 1] = "lamp change here\n"
    path.write_text("".join(damaged), encoding="utf-8")
    with pytest.raises(SpectrumFormatError, match=rf"line {row}.*damaged"):
        known_layer_from_export(path, 100.0)
    negative = lines.copy()
    cells = negative[row - 1].split(",")
    cells[1] = "-" + cells[1]
    negative[row - 1] = ",".join(cells)
    path.write_text("".join(negative), encoding="utf-8")
    with pytest.raises(SpectrumFormatError, match=rf"week1_nk_barrier.csv, line {row}.*n must "
                                                  "be positive"):
        known_layer_from_export(path, 100.0)


def test_table_cut_at_a_row_boundary_disagrees_with_its_result(barrier_export, tmp_path):
    path = _copy(barrier_export, tmp_path)
    path.write_text("".join(_lines(path)[:-10]), encoding="utf-8")
    with pytest.raises(SpectrumFormatError, match=r"week1_nk_barrier.csv: has \d+ rows of n, "
                                                  r"κ but the fit result beside it"):
        known_layer_from_export(path)
    # With the thickness given, the short table loads, and a spectrum reaching beyond
    # it is refused with both ranges named (never extrapolated).
    layer = known_layer_from_export(path, 99.0)
    top = float(layer.material.wl[-1])
    with pytest.raises(WavelengthRangeError, match=rf"week1_nk_barrier.csv is valid from "
                                                   rf"350 to {top:g} nm.*350-1000 nm"):
        known_layer_from_export(path, 99.0, covers_nm=WL)
    stack = Stack([Layer("film", Cauchy(), 500.0), layer], library_substrate("fused_silica"))
    with pytest.raises(FitError, match=rf"table week1_nk_barrier.csv is valid from 350 to "
                                       rf"{top:g} nm.*350-1000 nm"):
        fit_spectrum(_tmm_T([(TOP, D_TOP), (BARRIER, D_BARRIER)], wl=WL[::5]), stack)


def test_thickness_needs_a_matching_result_or_a_value(barrier_export, tmp_path):
    path = _copy(barrier_export, tmp_path, json_too=False)
    with pytest.raises(ParameterError, match=r"week1_nk_barrier.csv carries no thickness.*"
                                             r"week1_result.json.*give"):
        known_layer_from_export(path)
    assert known_layer_from_export(path, 98.2).source["thickness"] == {"value": 98.2,
                                                                     "from": "given"}
    out, _ = barrier_export
    doc = json.loads((out / "week1_result.json").read_text(encoding="utf-8"))
    doc["provenance"]["created"] = "2001-01-01T00:00:00+00:00"    # another fit's result
    (tmp_path / "week1_result.json").write_text(json.dumps(doc), encoding="utf-8")
    with pytest.raises(SpectrumFormatError, match=r"week1_result.json.*another fit.*created"):
        known_layer_from_export(path)
    doc = json.loads((out / "week1_result.json").read_text(encoding="utf-8"))
    doc["verdict"], doc["verdict_reasons"] = "poor", ["The model misses the data"]
    (tmp_path / "week1_result.json").write_text(json.dumps(doc), encoding="utf-8")
    with pytest.raises(ParameterError, match=r"judged poor.*misses the data.*fit that sample"):
        known_layer_from_export(path)
    (tmp_path / "week1_result.json").write_text('{"params": {', encoding="utf-8")
    with pytest.raises(SpectrumFormatError, match=r"week1_result.json, line 1.*not valid JSON"):
        known_layer_from_export(path)
    with pytest.raises(SpectrumFormatError, match="file not found"):
        known_layer_from_export(tmp_path / "nothing_nk_barrier.csv", 98.0)


def test_a_plain_table_with_decimal_commas_reads_like_an_export(tmp_path):
    # A hand-made table in the European style, with its thickness given.
    p = tmp_path / "barrier.csv"
    p.write_text("Wavelength (nm);n;k\n300;1,70;0,001\n600;1,68;0\n1100;1,66;0\n",
                 encoding="utf-8")
    mat, info = read_nk_table(p)
    assert mat.N([600.0])[0] == pytest.approx(1.68)
    assert info["rows"] == 3 and mat.describe() == "table barrier.csv"
    layer = known_layer_from_export(p, 80.0, name="base")
    assert layer.name == "base" and layer.thickness.value == 80.0 and "fit" not in layer.source


# -- recipes and the command line -------------------------------------------------------
def _recipe_naming_the_table(folder, **barrier):
    d = Recipe(Stack([Layer("film", Cauchy(), 500.0)], library_substrate("fused_silica")),
               name="film on known barrier", exports=("nk", "json")).to_dict()
    d["stack"]["layers"].append({"name": "barrier", "known": True,
                                 "material": {"kind": "tabulated",
                                              "file": "week1_nk_barrier.csv"}, **barrier})
    path = folder / "recipe.json"
    path.write_text(json.dumps(d), encoding="utf-8")
    return path


def test_recipe_names_a_table_file_and_saves_it_embedded(barrier_export, tmp_path):
    table = _copy(barrier_export, tmp_path)
    r = load_recipe(_recipe_naming_the_table(tmp_path))
    layer = r.stack.layer("barrier")
    assert layer.known and isinstance(layer.material, Tabulated)
    assert layer.thickness.value == barrier_export[1].thickness("barrier")[0]
    assert layer.source["file"] == "week1_nk_barrier.csv"       # as written in the recipe
    assert layer.source["sha256"] == sha256_of_file(table)
    # Saved elsewhere, the recipe needs no table file any more.
    (tmp_path / "elsewhere").mkdir()
    saved = save_recipe(r, tmp_path / "elsewhere" / "saved.json")
    table.unlink()
    r2 = load_recipe(saved)
    assert r2.to_dict() == r.to_dict() and r2.to_dict()["version"] == 2
    np.testing.assert_array_equal(r2.stack.RT(WL)[1], r.stack.RT(WL)[1])
    # Same layer as the helper makes.
    helper = known_layer_from_export(barrier_export[0] / "week1_nk_barrier.csv")
    np.testing.assert_array_equal(helper.material.n, layer.material.n)


def test_recipe_table_errors_name_the_field_and_file(barrier_export, tmp_path):
    path = _recipe_naming_the_table(tmp_path, thickness={"value": 98.2})
    with pytest.raises(RecipeError, match=r"stack.layers\[1\].material.file.*week1_nk_barrier"
                                          r".csv.*does not exist.*folder of the recipe"):
        load_recipe(path)
    _copy(barrier_export, tmp_path, json_too=False)
    assert load_recipe(path).stack.layer("barrier").thickness.value == 98.2
    with pytest.raises(RecipeError, match=r"stack.layers\[1\].thickness.*no fit result.*give"):
        load_recipe(_recipe_naming_the_table(tmp_path))
    d = json.loads(path.read_text(encoding="utf-8"))
    for edit, field in [
        (lambda ld: ld.update(known="true"), r"stack.layers\[1\].known"),
        (lambda ld: ld["material"].update(n=[1.6, 1.6]), r"stack.layers\[1\].material.n"),
        (lambda ld: ld["material"].update(kind="cauchy"), r"stack.layers\[1\].material.file"),
        (lambda ld: ld["material"].update(file=""), r"stack.layers\[1\].material.file"),
    ]:
        bad = json.loads(json.dumps(d))
        edit(bad["stack"]["layers"][1])
        with pytest.raises(RecipeError, match=field):
            recipe_from_dict(bad, path=path)
    lines = _lines(tmp_path / "week1_nk_barrier.csv")
    (tmp_path / "week1_nk_barrier.csv").write_text("".join(lines[:-1]) + lines[-1][:8],
                                                   encoding="utf-8")
    with pytest.raises(RecipeError, match=rf"material.file.*week1_nk_barrier.csv, line "
                                          rf"{len(lines)}"):
        load_recipe(path)


def test_recipe_identity_covers_known_layers():
    def recipe(known=True, d=D_BARRIER, n=1.66, source=None):
        barrier = Layer("barrier", Tabulated([300.0, 1100.0], [n, n - 0.02]), d, known=known,
                        source=source)
        return Recipe(Stack([Layer("film", Cauchy(), 500.0), barrier],
                            library_substrate("fused_silica")))
    base = recipe_identity(recipe())
    assert recipe_identity(recipe(known=False)) != base
    # A known layer's thickness is a value of the model even where its own flag says "fit".
    assert recipe(d=101.0).stack.layer("barrier").thickness.vary
    assert recipe_identity(recipe(d=101.0)) != base
    assert recipe_identity(recipe(n=1.67)) != base
    # Where the table came from is provenance, not model.
    assert recipe_identity(recipe(source={"file": "a.csv", "sha256": "0" * 64})) == base
    assert recipe_identity(recipe(source={"file": "b.csv", "sha256": "1" * 64})) == base
    # ... and the start value of a fitted layer still is not (no refit on --resume).
    assert recipe_identity(recipe(known=False, d=101.0)) == recipe_identity(recipe(known=False))


def test_cli_fit_and_batch_with_a_recipe_naming_the_table(barrier_export, tmp_path,
                                                          two_layer_spectrum):
    _copy(barrier_export, tmp_path)
    recipe = _recipe_naming_the_table(tmp_path)
    spec_dir = tmp_path / "spectra"
    spec_dir.mkdir()
    write_spectrum(spec_dir / "s1.csv", two_layer_spectrum)
    import io
    out, err = io.StringIO(), io.StringIO()
    code = cli_main(["batch", str(spec_dir), "--recipe", str(recipe), "--out",
                     str(tmp_path / "res"), "--no-figures", "--jobs", "1"],
                    stdout=out, stderr=err)
    assert code == 0, err.getvalue()
    saved = json.loads((tmp_path / "res" / "recipe.json").read_text(encoding="utf-8"))
    layer = saved["stack"]["layers"][1]
    assert layer["known"] is True and "file" not in layer["material"]
    assert layer["source"]["sha256"] == sha256_of_file(tmp_path / "week1_nk_barrier.csv")
    docs = list((tmp_path / "res").rglob("*_result.json"))
    assert len(docs) == 1
    doc = json.loads(docs[0].read_text(encoding="utf-8"))
    assert doc["params"]["film_thickness"]["value"] == pytest.approx(D_TOP, rel=0.01)
    assert doc["params"]["barrier_thickness"]["vary"] is False
