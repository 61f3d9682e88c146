"""Speed of the stack engine, the fit and the batch runner: ``python -m fitting.bench``.

One run measures, on this machine:

1. **forward** -- one evaluation of T (and R) through :class:`~fitting.stack.StackModel`
   bound to the grid, with parameters changing between calls as in a fit (the film's
   N is recomputed, the substrate is cached), for air | film | 1 mm fused silica | air
   at normal incidence, a 3-film stack, and 45° unpolarised light; each against the
   reference library ``tmm`` (``tmm.inc_tmm`` per wavelength, its intended use) on the
   same stack in the same run, with the largest |ΔT| between the two;
2. **fit** -- complete fits from the automatic start (thickness + Cauchy + Urbach) of
   synthetic spectra with 0.2 % noise, over several noise seeds;
3. **batch** -- the demo recipe (without per-spectrum figures; the report's summary
   figures once at the end) on copies of the demo spectra through the real
   ``pellucid batch`` command on all cores, for several batch sizes
   (``--batch-counts``, default 10, 50, 200; the full check is 10,100,1000,2000):
   spectra per second and seconds per spectrum at each size, the log-log slope of
   the wall time against the number of spectra (1 = linear, target <= 1.05 between
   the two largest), peak memory of the process tree and of the main process
   (target: flat), the efficiency against the same work done one spectrum at a
   time in this process (measured in the same run), and a short run with the
   recipe's per-spectrum figures;
4. **scaling** -- cost against the number of wavelengths and of layers, with the
   log-log slopes (1 = linear).

Every time is a median over many calls after warm-up calls (``time.perf_counter``).
Results are printed as a table and written to JSON (``--out``, default
``bench_results.json``) with a description of the machine. ``--quick`` runs tiny
sizes in a few seconds (the smoke test uses it), ``--skip-batch`` leaves out the
subprocess part, ``--repeat N`` sets the number of timed calls per forward
measurement.

The desktop app's responsiveness (longest GUI-thread stall per user step) is measured
by its own script, ``python -m app.bench``, since this module never imports Qt.

Numbers depend on the BLAS/NumPy build: on machines that set
``OPENBLAS_CORETYPE``/``OPENBLAS_L2_SIZE`` the JSON records both.
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from .atomic import atomic_write_json
from .dispersion import Cauchy
from .errors import PellucidError
from .jsonsafe import json_safe
from .stack import Layer, Stack
from .substrates import library_substrate

__all__ = ["run_benchmark", "machine_info", "time_calls", "main", "AGREEMENT_TOL"]

#: Largest |ΔT| against tmm accepted as agreement (double precision leaves ~1e-15).
AGREEMENT_TOL = 1e-9

_WL_RANGE_NM = (300.0, 1100.0)
_FULL = dict(forward_sizes=(1000, 5000), scaling_sizes=(500, 1000, 2000, 5000, 10000, 20000),
             scaling_layers=(1, 2, 5, 10, 20), tmm_repeat=3, fit_points=1000, fit_seeds=5,
             batch_counts=(10, 50, 200), batch_figures=10, repeat=200)
_QUICK = dict(forward_sizes=(40, 80), scaling_sizes=(50, 100, 200), scaling_layers=(1, 2, 4),
              tmm_repeat=1, fit_points=150, fit_seeds=1, batch_counts=(2, 4), batch_figures=1,
              repeat=15)


# -- machine and timing ---------------------------------------------------------------------

def _cpu_model() -> str:
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as fh:
            for line in fh:
                if line.lower().startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def _blas_info():
    try:
        import threadpoolctl
    except ImportError:
        try:  # the build configuration numpy reports (no runtime thread info)
            cfg = np.show_config(mode="dicts")
            return {"source": "numpy.show_config",
                    "blas": cfg.get("Build Dependencies", {}).get("blas", {}),
                    "lapack": cfg.get("Build Dependencies", {}).get("lapack", {})}
        except Exception as exc:  # noqa: BLE001 - informational only
            return {"source": "unavailable", "reason": str(exc)}
    return {"source": "threadpoolctl", "pools": threadpoolctl.threadpool_info()}


def machine_info() -> dict:
    """Platform, CPU, cores, library versions, BLAS and the environment that steers it."""
    import scipy

    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:
        usable = os.cpu_count()
    try:
        import tmm
        tmm_version = getattr(tmm, "__version__", "installed")
    except ImportError:
        tmm_version = None
    return {
        "platform": platform.platform(), "python": platform.python_version(),
        "cpu_model": _cpu_model(), "cpu_count": os.cpu_count(), "cpus_usable": usable,
        "numpy": np.__version__, "scipy": scipy.__version__, "tmm": tmm_version,
        "blas": _blas_info(),
        "load_average_1_5_15min": list(os.getloadavg()) if hasattr(os, "getloadavg") else None,
        "env": {k: os.environ.get(k) for k in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE",
                                               "OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS",
                                               "MKL_NUM_THREADS")},
    }


def time_calls(fn, repeat: int, *, warmup: int = 3) -> dict:
    """Median (and spread) of ``repeat`` timed calls of ``fn()`` after ``warmup`` calls."""
    for _ in range(warmup):
        fn()
    t = np.empty(repeat)
    for i in range(repeat):
        t0 = time.perf_counter()
        fn()
        t[i] = time.perf_counter() - t0
    q1, med, q3 = np.percentile(t, [25, 50, 75])
    return {"median_s": float(med), "iqr_s": float(q3 - q1), "min_s": float(t.min()),
            "n": int(repeat)}


def _loglog_slope(x, y) -> float:
    """Slope of log y against log x (1 = cost proportional to size)."""
    return float(np.polyfit(np.log(x), np.log(y), 1)[0])


def _r2_linear(x, y) -> float:
    """Coefficient of determination of a straight-line fit of y against x."""
    x, y = np.asarray(x, float), np.asarray(y, float)
    resid = y - np.polyval(np.polyfit(x, y, 1), x)
    ss = float(np.sum((y - y.mean()) ** 2))
    return 1.0 - float(np.sum(resid ** 2)) / ss if ss > 0 else 1.0


# -- the synthetic samples ------------------------------------------------------------------

def _film(i: int = 0) -> Cauchy:
    """Invented Cauchy + Urbach films (no real material): indices 1.7-2.3, weak tail."""
    return Cauchy(2.05 - 0.15 * (i % 3), 0.02 + 0.005 * (i % 2), urbach=True,
                  k0=0.004, Eu=0.25)


def demo_stack(n_films: int = 1) -> Stack:
    """air | n_films Cauchy + Urbach films | 1 mm fused silica (incoherent) | air."""
    layers = [Layer(f"film{i + 1}", _film(i), 600.0 - 40.0 * (i % 5)) for i in range(n_films)]
    return Stack(layers, library_substrate("fused_silica", 1.0))


def _fit_values(stack: Stack, n: int, rng) -> list[dict]:
    """Parameter sets as a fit visits them: every thickness and n level moves a little."""
    base = stack.values()
    out = []
    for _ in range(n):
        v = dict(base)
        for layer in stack.layers:
            v[f"{layer.name}_thickness"] *= 1 + 1e-3 * rng.standard_normal()
            v[f"{layer.name}_A"] += 1e-3 * rng.standard_normal()
        out.append(v)
    return out


def _time_model(stack: Stack, wl, angle_deg: float, pol: str, repeat: int) -> dict:
    model = stack.evaluator(wl, angle_deg=angle_deg, polarization=pol)
    values = _fit_values(stack, 64, np.random.default_rng(1))
    state = {"i": 0}

    def call():
        state["i"] += 1
        model.RT(values[state["i"] % len(values)])

    return time_calls(call, repeat, warmup=5)


def tmm_RT(stack: Stack, wavelength_nm, angle_deg: float = 0.0, pol: str = "u"):
    """R, T of ``stack`` from ``tmm.inc_tmm`` called per wavelength (the reference)."""
    import tmm

    wl = np.asarray(wavelength_nm, dtype=float)
    films = [layer.material.N(wl) for layer in stack.layers]
    N_amb, N_sub, N_exit = stack.ambient.N(wl), stack.substrate.N(wl), stack.exit_medium.N(wl)
    d_list = [np.inf, *(layer.thickness_nm for layer in stack.layers),
              stack.substrate.thickness_nm, np.inf]
    c_list = ["i", *("c" for _ in films), "i", "i"]
    # At normal incidence s and p carry the same power: one call, as a user would.
    pols = ("s", "p") if pol == "u" and angle_deg != 0 else ("s" if pol == "u" else pol,)
    th0 = math.radians(angle_deg)
    R, T = np.zeros(wl.size), np.zeros(wl.size)
    for i, lam in enumerate(wl):
        n_list = [N_amb[i], *(N[i] for N in films), N_sub[i], N_exit[i]]
        for p in pols:
            out = tmm.inc_tmm(p, n_list, d_list, c_list, th0, lam)
            R[i] += out["R"] / len(pols)
            T[i] += out["T"] / len(pols)
    return R, T


def bench_forward(sizes, repeat: int, tmm_repeat: int) -> list[dict]:
    """Forward-model cases of the issue, each against tmm on the same stack."""
    try:
        import tmm  # noqa: F401
        have_tmm = True
    except ImportError:
        have_tmm = False
    cases = [("1 film, normal", 1, 0.0, "u"), ("3 films, normal", 3, 0.0, "u"),
             ("1 film, 45° unpolarised", 1, 45.0, "u")]
    rows = []
    for label, n_films, angle, pol in cases:
        stack = demo_stack(n_films)
        for W in sizes:
            wl = np.linspace(*_WL_RANGE_NM, W)
            row = {"case": label, "films": n_films, "angle_deg": angle, "polarization": pol,
                   "wavelengths": W, "pellucid": _time_model(stack, wl, angle, pol, repeat)}
            if have_tmm:
                R, T = stack.RT(wl, angle_deg=angle, polarization=pol)
                ref = {}

                def reference(stack=stack, wl=wl, angle=angle, pol=pol, ref=ref):
                    ref["RT"] = tmm_RT(stack, wl, angle, pol)

                row["tmm"] = time_calls(reference, tmm_repeat, warmup=0)
                dT = float(np.max(np.abs(T - ref["RT"][1])))
                dR = float(np.max(np.abs(R - ref["RT"][0])))
                row.update(max_abs_dT=dT, max_abs_dR=dR, agree=bool(dT < AGREEMENT_TOL),
                           speedup=row["tmm"]["median_s"] / row["pellucid"]["median_s"])
            else:
                row["note"] = "tmm is not installed: no reference timing or agreement check"
            rows.append(row)
    return rows


def bench_scaling(sizes, layers, repeat: int) -> dict:
    """Median call time against wavelengths (1 film) and layers (1000 wavelengths)."""
    by_w = [{"wavelengths": W, **_time_model(demo_stack(1), np.linspace(*_WL_RANGE_NM, W),
                                             0.0, "u", repeat)} for W in sizes]
    W_layers = 1000 if max(sizes) >= 1000 else max(sizes)
    wl = np.linspace(*_WL_RANGE_NM, W_layers)
    by_l = [{"layers": L, **_time_model(demo_stack(L), wl, 0.0, "u", repeat)} for L in layers]
    tw = [r["median_s"] for r in by_w]
    tl = [r["median_s"] for r in by_l]
    half = len(sizes) // 2
    per_layer, fixed = np.polyfit(layers, tl, 1)
    return {
        "wavelengths": by_w, "layers": by_l, "layers_at_wavelengths": W_layers,
        "slope_loglog_wavelengths": _loglog_slope(sizes, tw),
        "slope_loglog_wavelengths_upper": _loglog_slope(sizes[half:], tw[half:]),
        "slope_loglog_layers": _loglog_slope(layers, tl),
        "per_layer_s": float(per_layer), "fixed_s": float(fixed),
        "r2_linear_wavelengths": _r2_linear(sizes, tw), "r2_linear_layers": _r2_linear(layers, tl),
        "per_wavelength_s_at_max": tw[-1] / sizes[-1],
    }


# -- one complete fit --------------------------------------------------------------------

def _fit_start_stack() -> Stack:
    """What a user starts from: a Cauchy + Urbach film at its default values."""
    return Stack([Layer("film", Cauchy(urbach=True))], library_substrate("fused_silica", 1.0))


def bench_fit(n_points: int, seeds: int, *, warmup: bool = True) -> dict:
    """Complete fits from the automatic start of noisy synthetic spectra."""
    from .fit import FitOptions, fit_spectrum
    from .spectrum import Spectrum
    truth = Stack([Layer("film", Cauchy(2.1, 0.025, urbach=True, k0=0.003, Eu=0.22), 735.0)],
                  library_substrate("fused_silica", 1.0))
    wl = np.linspace(*_WL_RANGE_NM, n_points)
    T_true = truth.transmittance(wl)
    runs = []
    options = FitOptions(method="auto")
    if warmup:  # lazy imports and first-call caches are not part of a fit's cost
        y = T_true + 0.002 * np.random.default_rng(99).standard_normal(n_points)
        fit_spectrum(Spectrum(wl, y, quantity="T"), _fit_start_stack(), options)
    for seed in range(seeds):
        rng = np.random.default_rng(100 + seed)
        y = T_true + 0.002 * rng.standard_normal(n_points)
        spec = Spectrum(wl, y, quantity="T", name=f"synthetic seed {seed}")
        t0 = time.perf_counter()
        res = fit_spectrum(spec, _fit_start_stack(), options)
        wall = time.perf_counter() - t0
        d = res.params["film_thickness"].value if "film_thickness" in res.params else math.nan
        runs.append({"seed": seed, "wall_s": wall, "elapsed_s": float(res.elapsed_s),
                     "nfev": int(res.nfev), "success": bool(res.success),
                     "thickness_nm": float(d), "thickness_error_nm": float(d - 735.0)})
    walls = [r["wall_s"] for r in runs]
    # The same run's references: one model evaluation of the fitted stack, and the
    # same fits with the measurement's nuisance terms off (scale, tilt, non-uniformity:
    # the fit as it was before they became the defaults), so the cost of the honest
    # defaults is a ratio, whatever else the machine is doing.
    from .stack import StackModel
    sm = StackModel(truth, wl)
    rng = np.random.default_rng(0)     # a new A each call: nothing cached is timed
    one_eval = time_calls(lambda: sm.RT({"film_A": 2.1 + 1e-9 * rng.random()}), 50)
    bare = FitOptions(method="auto", fit_scale=False, fit_tilt=False, fit_spread=False)
    ref = []
    for seed in range(seeds):
        y = T_true + 0.002 * np.random.default_rng(100 + seed).standard_normal(n_points)
        t0 = time.perf_counter()
        fit_spectrum(Spectrum(wl, y, quantity="T"), _fit_start_stack(), bare)
        ref.append(time.perf_counter() - t0)
    med = float(np.median(walls))
    return {"points": n_points, "noise": 0.002, "seeds": seeds, "true_thickness_nm": 735.0,
            "median_wall_s": med,
            "median_nfev": float(np.median([r["nfev"] for r in runs])),
            "median_s_per_evaluation": float(np.median([r["wall_s"] / max(r["nfev"], 1)
                                                        for r in runs])),
            "successes": sum(r["success"] for r in runs),
            "model_evaluation_s": one_eval["median_s"],
            "fit_in_model_evaluations": med / one_eval["median_s"],
            "without_nuisance_median_wall_s": float(np.median(ref)),
            "ratio_to_without_nuisance": med / float(np.median(ref)),
            "demo_recipe": bench_demo_fits(),
            "runs": runs}


def bench_demo_fits(count: int = 14) -> dict:
    """Fits of the shipped demo spectra with the demo recipe (Tauc-Lorentz film), in-process.

    The per-spectrum fit time a batch of the demo recipe pays, without reading,
    exports or process start-up.
    """
    from .fit import fit_spectrum
    from .reader import ReaderOptions, read_spectrum
    from .recipe import load_recipe
    root = Path(__file__).resolve().parent.parent / "demo_data"
    try:
        rec = load_recipe(root / "recipe.json")
    except (OSError, PellucidError) as e:
        return {"skipped": f"demo recipe not readable ({e})"}
    files = sorted((root / "spectra").glob("PL2-T-01*"))[:count]
    times, nfev = [], []
    for f in files:
        try:
            sp = read_spectrum(f, options=ReaderOptions.from_dict(dict(rec.reader)))
        except PellucidError:
            continue
        t0 = time.perf_counter()
        res = fit_spectrum(sp, rec.new_stack(), rec.make_fit_options(sp))
        times.append(time.perf_counter() - t0)
        nfev.append(res.nfev)
    if not times:
        return {"skipped": "no demo spectrum could be read"}
    return {"spectra": len(times), "median_wall_s": float(np.median(times)),
            "max_wall_s": float(np.max(times)), "median_nfev": float(np.median(nfev))}


# -- the batch command -----------------------------------------------------------------------

def _pellucid_command() -> list[str]:
    exe = shutil.which("pellucid")
    return [exe] if exe else [sys.executable, "-m", "fitting.cli"]


def _proc_children() -> dict[int, list[int]]:
    kids: dict[int, list[int]] = {}
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                ppid = int((d / "stat").read_text().rsplit(")", 1)[1].split()[1])
            except (OSError, ValueError, IndexError):
                continue
            kids.setdefault(ppid, []).append(int(d.name))
    return kids


def _proc_rss(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/statm", encoding="ascii") as fh:
            return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        return 0


def _tree_rss(proc) -> tuple[int, int]:
    """Resident memory (bytes) of a process and of it with all its descendants (0 once
    gone). ``proc`` is a pid (read from /proc) or a psutil.Process."""
    if isinstance(proc, int):
        kids, members, frontier = _proc_children(), [], [proc]
        while frontier:
            members += frontier
            frontier = [c for p in frontier for c in kids.get(p, [])]
        rss = [_proc_rss(p) for p in members]
        return (rss[0] if rss else 0), sum(rss)
    import psutil

    try:
        members = [proc, *proc.children(recursive=True)]
    except psutil.Error:
        return 0, 0
    total, own = 0, 0
    for p in members:
        try:
            r = p.memory_info().rss
        except psutil.Error:
            continue
        total += r
        own = r if p is proc else own
    return own, total


def _rss_source():
    if Path("/proc/self/statm").exists():
        return "proc"
    try:
        import psutil  # noqa: F401
        return "psutil"
    except ImportError:
        return None


def _run_sampled(cmd, cwd) -> dict:
    """Run ``cmd``, sampling the RSS of its process tree every 20 ms.

    Output goes to files, not pipes: a long batch writes more progress lines than a
    pipe holds, and an unread pipe would stall it.
    """
    source = _rss_source()
    t0 = time.perf_counter()
    with tempfile.TemporaryFile() as fo, tempfile.TemporaryFile() as fe:
        popen = subprocess.Popen(cmd, cwd=cwd, stdout=fo, stderr=fe, stdin=subprocess.DEVNULL)
        if source == "psutil":
            import psutil
            target = psutil.Process(popen.pid)
        else:
            target = popen.pid
        peak, peak_main = 0, 0
        while popen.poll() is None:
            if source:
                own, total = _tree_rss(target)
                peak, peak_main = max(peak, total), max(peak_main, own)
            time.sleep(0.02)
        wall = time.perf_counter() - t0
        fo.seek(0)
        fe.seek(0)
        out, err = fo.read(), fe.read()
    return {"wall_s": wall, "returncode": popen.returncode, "peak_tree_rss_bytes": peak,
            "peak_main_rss_bytes": peak_main, "rss_source": source,
            "stdout_tail": out.decode(errors="replace")[-400:],
            "stderr_tail": err.decode(errors="replace")[-800:]}


def _demo_inputs():
    """(recipe path, spectrum files) of the shipped demo set, or None when not installed."""
    root = Path(__file__).resolve().parent.parent / "demo_data"
    recipe, spectra = root / "recipe.json", sorted((root / "spectra").glob("*.csv"))
    return (recipe, spectra) if recipe.is_file() and spectra else None


def _write_spectra(folder: Path, count: int, n_points: int) -> list[Path]:
    """Synthetic T spectra (thickness varies as over a coated batch) as two-column CSV."""
    rng = np.random.default_rng(7)
    wl = np.linspace(*_WL_RANGE_NM, n_points)
    from .reader import write_spectrum
    from .spectrum import Spectrum
    paths = []
    for i in range(count):
        st = Stack([Layer("film", Cauchy(2.1, 0.025, urbach=True, k0=0.003, Eu=0.22),
                          700.0 + 0.4 * i)], library_substrate("fused_silica", 1.0))
        y = st.transmittance(wl) + 0.002 * rng.standard_normal(n_points)
        path = folder / f"sample_{i:04d}.csv"
        write_spectrum(path, Spectrum(wl, y, quantity="T", name=path.stem))
        paths.append(path)
    return paths


def _batch_inputs(tmp: Path, count: int, n_points: int):
    """(recipe path, spectra, label): the demo recipe with copies of the demo spectra
    (each file once under several names) where the demo set is installed, else a
    synthetic film and a built-in recipe."""
    (tmp / "spectra").mkdir()
    demo = _demo_inputs()
    if demo is not None:
        recipe, originals = demo
        paths = []
        for i in range(count):
            src = originals[i % len(originals)]
            dst = tmp / "spectra" / f"d{i:05d}_{src.name}"
            try:
                os.link(src, dst)
            except OSError:
                shutil.copyfile(src, dst)
            paths.append(dst)
        return recipe, paths, f"demo recipe, {len(originals)} demo spectra repeated"
    paths = _write_spectra(tmp / "spectra", count, n_points)
    recipe = tmp / "recipe_default.json"
    _write_recipe(recipe)
    return recipe, paths, "built-in Cauchy + Urbach recipe, synthetic spectra"


#: Per-spectrum exports of the throughput series: every table, no figures. Figures
#: (matplotlib) cost more than the fit itself and are timed in their own short series.
TABLE_EXPORTS = ("nk", "curves", "json", "report")


def _write_recipe(path: Path, exports=None):
    from .recipe import Recipe, save_recipe

    kw = {} if exports is None else {"exports": tuple(exports)}
    save_recipe(Recipe(_fit_start_stack(), name="benchmark film on fused silica", **kw), path)


def _batch_series(cmd, tmp: Path, recipe_path: Path, paths, counts, jobs: int, tag: str,
                  extra=()):
    """One ``pellucid batch`` run per count, on the first ``count`` spectra."""
    runs = []
    for n in counts:
        src = tmp / f"in_{tag}_{n}"
        src.mkdir()
        for p in paths[:n]:
            os.link(p, src / p.name)
        run = _run_sampled([*cmd, "batch", "--recipe", str(recipe_path), "--out",
                            str(tmp / f"out_{tag}_{n}"), "--jobs", str(jobs), *extra,
                            str(src)], tmp)
        run.update(spectra=n, spectra_per_s=n / run["wall_s"],
                   seconds_per_spectrum=run["wall_s"] / n)
        runs.append(run)
        shutil.rmtree(tmp / f"out_{tag}_{n}", ignore_errors=True)   # disk stays flat too
        shutil.rmtree(src, ignore_errors=True)
        # Exit status 1 or 3 means some spectra failed or need checking (recorded, batch
        # finished); 2 is a usage error or a crash: stop the series.
        if run["returncode"] not in (0, 1, 3):
            break
    return runs


def _series_summary(runs, counts) -> dict:
    ok = [r for r in runs if r["returncode"] in (0, 1, 3)]
    out = {"runs": runs}
    if len(ok) != len(counts):
        out["failed"] = "a batch run ended with exit status 2 or a crash; see runs[-1]"
        return out
    n = np.array([r["spectra"] for r in ok], float)
    t = np.array([r["wall_s"] for r in ok])
    peaks = [r["peak_tree_rss_bytes"] for r in ok]
    out.update(spectra_per_s=ok[-1]["spectra_per_s"],
               peak_tree_rss_mb=max(peaks) / 2 ** 20,
               all_fits_ok=all(r["returncode"] == 0 for r in ok))
    if len(ok) >= 2:
        slope, intercept = np.polyfit(n, t, 1)
        out.update(seconds_per_spectrum_slope=float(slope), startup_s=float(intercept),
                   per_spectrum_ratio_last_first=float((t[-1] / n[-1]) / (t[0] / n[0])),
                   slope_loglog=_loglog_slope(n, t),
                   # Between the two largest batches start-up no longer hides growth.
                   slope_loglog_upper=_loglog_slope(n[-2:], t[-2:]),
                   peak_rss_ratio_last_first=(peaks[-1] / peaks[0]) if peaks[0] else None)
    return out


def _reference_fit_s(recipe_path: Path, spectra, repeat: int = 1) -> float:
    """Mean in-process time of read + fit + table exports over ``spectra``: the batch's
    ideal is ``jobs`` of these at once, measured in the same run on the same machine.

    ``spectra`` are the distinct inputs the batch cycles through: their fits differ
    (the demo set's take 0.2 to 0.33 s each), so one of them alone is no reference.
    Each spectrum's time is its median over ``repeat`` calls after a first call that
    pays lazy imports and caches.
    """
    from .atomic import deferred_sync
    from .batch import Prepared, _export, export_stem
    from .recipe import load_recipe
    recipe = load_recipe(recipe_path)
    recipe = type(recipe).from_dict({**recipe.to_dict(), "outputs": {
        "exports": list(TABLE_EXPORTS), "plot_formats": list(recipe.plot_formats)}},
        path=recipe_path)
    prep = Prepared(recipe.resolved())
    spectra = [spectra] if isinstance(spectra, (str, os.PathLike)) else list(spectra)
    per_spectrum = []
    with tempfile.TemporaryDirectory(prefix="pellucid-ref-") as tmp:
        for k, spectrum in enumerate(spectra):
            times = []
            for _ in range(repeat + (k == 0)):
                t0 = time.perf_counter()
                sp = prep.spectrum(spectrum)
                res = prep.fit_spectrum(sp, recipe.new_stack(), recipe.make_fit_options(sp))
                with deferred_sync():          # as the batch writes a spectrum's files
                    _export(res, Path(tmp), export_stem(spectrum),
                            prep.provenance(spectrum, ""), prep.recipe)
                times.append(time.perf_counter() - t0)
            # The very first call pays lazy imports and caches: not counted.
            per_spectrum.append(float(np.median(times[1:] if k == 0 else times)))
    return float(np.mean(per_spectrum))


#: Synthetic inputs in the reference (each differs in thickness only).
_SYNTHETIC_REFERENCE = 7


def _reference_count(label: str) -> int:
    """How many of the first inputs are distinct: the demo set's size, else a sample."""
    demo = _demo_inputs()
    return len(demo[1]) if demo is not None and label.startswith("demo") \
        else _SYNTHETIC_REFERENCE


def bench_batch(counts, jobs: int, n_points: int, figure_count: int) -> dict:
    """Spectra through ``pellucid batch`` in a subprocess: throughput, memory, linearity.

    The throughput series (``counts``) runs the demo recipe without per-spectrum
    figures (``--no-figures``; the report's summary figures are drawn once at the
    end); a short series of ``figure_count`` spectra with the recipe's own figures
    shows what they add. The reference is the same work done in this process, one
    spectrum at a time: ``efficiency`` = measured spectra/s ÷ (jobs ÷ reference time).
    """
    if _rss_source() is None:
        return {"skipped": "no way to sample memory here (no /proc and no psutil)"}
    cmd = _pellucid_command()
    probe = subprocess.run([*cmd, "batch", "--help"], capture_output=True, text=True)
    if probe.returncode != 0:
        return {"skipped": "the 'pellucid batch' command is not available yet",
                "detail": (probe.stderr or probe.stdout)[-300:]}
    result = {"jobs": jobs, "command": " ".join([*cmd, "batch"]), "counts": list(counts),
              "exports": list(TABLE_EXPORTS) + ["report.pdf"]}
    with tempfile.TemporaryDirectory(prefix="pellucid-bench-") as tmp:
        tmp = Path(tmp)
        recipe_path, paths, label = _batch_inputs(tmp, max(max(counts), figure_count),
                                                  n_points)
        result["inputs"] = label
        distinct = paths[:min(len(paths), _reference_count(label))]
        ref = _reference_fit_s(recipe_path, distinct)
        result["reference_s_per_spectrum_one_process"] = ref
        result["reference_inputs"] = len(distinct)
        result.update(_series_summary(
            _batch_series(cmd, tmp, recipe_path, paths, counts, jobs, "tables",
                          extra=("--no-figures",)), counts))
        if "spectra_per_s" in result:
            result["efficiency"] = result["spectra_per_s"] / (jobs / ref)
        if figure_count and "failed" not in result:
            fig_runs = _batch_series(cmd, tmp, recipe_path, paths, (figure_count,), jobs,
                                     "figures")
            result["with_figures"] = _series_summary(fig_runs, (figure_count,))
    return result


# -- driver ----------------------------------------------------------------------------------

def run_benchmark(*, quick: bool = False, skip_batch: bool = False,
                  repeat: int | None = None, batch_counts=None, batch_figures=None,
                  batch_only: bool = False) -> dict:
    """Run every part and return the JSON-ready results.

    ``batch_counts`` (spectra per batch run, e.g. ``(10, 100, 1000, 2000)``) and
    ``batch_figures`` replace the defaults; ``batch_only`` leaves out the forward,
    scaling and fit parts.
    """
    cfg = dict(_QUICK if quick else _FULL)
    if repeat is not None:
        cfg["repeat"] = int(repeat)
    if batch_counts:
        cfg["batch_counts"] = tuple(sorted(int(n) for n in batch_counts))
    if batch_figures is not None:
        cfg["batch_figures"] = int(batch_figures)
    t0 = time.perf_counter()
    out = {"pellucid_bench": 1, "quick": quick, "machine": machine_info(),
           "settings": {k: list(v) if isinstance(v, tuple) else v for k, v in cfg.items()},
           "agreement_tol": AGREEMENT_TOL}
    skipped = {"skipped": "--batch-only"}
    out["forward"] = [] if batch_only else bench_forward(cfg["forward_sizes"], cfg["repeat"],
                                                         cfg["tmm_repeat"])
    out["scaling"] = skipped if batch_only else bench_scaling(
        cfg["scaling_sizes"], cfg["scaling_layers"], cfg["repeat"])
    out["fit"] = skipped if batch_only else bench_fit(cfg["fit_points"], cfg["fit_seeds"],
                                                      warmup=not quick)
    if skip_batch:
        out["batch"] = {"skipped": "--skip-batch"}
    else:
        out["batch"] = bench_batch(cfg["batch_counts"], out["machine"]["cpus_usable"] or 1,
                                   cfg["fit_points"], cfg["batch_figures"])
    out["all_agree"] = all(r.get("agree", True) for r in out["forward"])
    out["targets"] = {} if quick else _targets(out)  # quick sizes are not the targets' sizes
    if hasattr(os, "getloadavg"):  # other work on the machine inflates every time
        out["load_average_at_end"] = list(os.getloadavg())
    out["total_s"] = time.perf_counter() - t0
    return out


def _targets(res: dict) -> dict:
    """The issue's targets (2-core machine), each with the measured value and whether met."""
    out = {}
    ref = [r for r in res["forward"] if r["films"] == 1 and r["angle_deg"] == 0.0
           and r["wavelengths"] == 1000]
    if ref:
        t = ref[0]["pellucid"]["median_s"]
        out["forward_1film_1000_median_below_150us"] = {"value_s": t, "met": t < 150e-6}
        if "speedup" in ref[0]:
            out["forward_1film_1000_speedup_vs_tmm_at_least_200"] = {
                "value": ref[0]["speedup"], "met": ref[0]["speedup"] >= 200}
    if "median_wall_s" in res["fit"]:
        t = res["fit"]["median_wall_s"]
        out["fit_median_below_0.25s"] = {"value_s": t, "met": t < 0.25}
    b = res.get("batch", {})
    if "spectra_per_s" in b:
        v = b["spectra_per_s"]
        out["batch_at_least_10_spectra_per_s"] = {"value": v, "met": v >= 10}
    if "slope_loglog_upper" in b:
        v = b["slope_loglog_upper"]
        out["batch_loglog_slope_at_most_1.05"] = {"value": v, "met": v <= 1.05}
    if b.get("peak_rss_ratio_last_first"):
        v = b["peak_rss_ratio_last_first"]
        out["batch_peak_rss_flat_within_10_percent"] = {"value": v, "met": v <= 1.10}
    return out


def _us(s: float) -> str:
    return f"{s * 1e6:10.1f}"


def format_report(res: dict) -> str:
    """The human-readable table of a :func:`run_benchmark` result."""
    m = res["machine"]
    lines = [f"Pellucid benchmark on {m['cpu_model']} ({m['cpus_usable']} cores), "
             f"numpy {m['numpy']}, scipy {m['scipy']}, python {m['python']}"]
    if m.get("load_average_1_5_15min"):
        start, end = m["load_average_1_5_15min"][0], res.get("load_average_at_end", [math.nan])[0]
        busy = max(start, end) > (m["cpus_usable"] or 1)
        lines.append(f"load average at start {start:.2f}, at end {end:.2f}"
                     + (": more than the cores, other work inflates these times" if busy else ""))
    if "skipped" in res["scaling"]:          # --batch-only
        return "\n".join(lines + _batch_lines(res) + _target_lines(res))
    lines.append("")
    lines.append("Forward model (median per call, parameters changing as in a fit)")
    lines.append(f"{'case':26s}{'W':>7s}{'pellucid µs':>13s}{'tmm ms':>11s}{'speed-up':>10s}"
                 f"{'max|ΔT|':>11s}")
    for r in res["forward"]:
        tm = r.get("tmm")
        lines.append(f"{r['case']:26s}{r['wavelengths']:7d}{_us(r['pellucid']['median_s'])}   "
                     + (f"{tm['median_s'] * 1e3:10.1f}{r['speedup']:9.0f}x{r['max_abs_dT']:11.1e}"
                        if tm else "   (no tmm)"))
    sc = res["scaling"]
    lines += ["", "Cost against wavelengths (1 film)"]
    lines += [f"  W = {r['wavelengths']:6d}  {_us(r['median_s'])} µs" for r in sc["wavelengths"]]
    lines.append(f"  log-log slope {sc['slope_loglog_wavelengths']:.2f} "
                 f"(upper half {sc['slope_loglog_wavelengths_upper']:.2f}; 1 = linear)")
    lines += ["", f"Cost against layers ({sc['layers_at_wavelengths']} wavelengths)"]
    lines += [f"  L = {r['layers']:3d}  {_us(r['median_s'])} µs" for r in sc["layers"]]
    lines.append(f"  log-log slope {sc['slope_loglog_layers']:.2f}; linear fit "
                 f"{sc['per_layer_s'] * 1e6:.1f} µs per layer + {sc['fixed_s'] * 1e6:.1f} µs")
    f = res["fit"]
    lines += ["", "Complete fit from the automatic start"]
    if "skipped" in f:
        lines.append(f"  skipped: {f['skipped']}")
    else:
        lines.append(f"  {f['points']} points, noise {f['noise'] * 100:.1f} %, {f['seeds']} seeds: "
                     f"median {f['median_wall_s']:.3f} s, {f['median_nfev']:.0f} evaluations "
                     f"(a Jacobian counted as one per parameter), "
                     f"{f['median_s_per_evaluation'] * 1e6:.0f} µs each, "
                     f"{f['successes']}/{f['seeds']} converged")
        lines.append(f"  = {f['fit_in_model_evaluations']:.0f} evaluations' worth of one model "
                     f"evaluation ({f['model_evaluation_s'] * 1e6:.0f} µs); "
                     f"{f['ratio_to_without_nuisance']:.2f} × the same fits without scale, "
                     f"tilt and non-uniformity ({f['without_nuisance_median_wall_s']:.3f} s)")
        dm = f.get("demo_recipe", {})
        if "median_wall_s" in dm:
            lines.append(f"  demo recipe (Tauc-Lorentz film), {dm['spectra']} spectra: median "
                         f"{dm['median_wall_s']:.3f} s, slowest {dm['max_wall_s']:.3f} s, "
                         f"{dm['median_nfev']:.0f} evaluations")
    lines += _batch_lines(res) + _target_lines(res)
    lines += ["", f"agreement with tmm (max |ΔT| < {res['agreement_tol']:g}): "
                  f"{'yes' if res['all_agree'] else 'NO'}; total {res['total_s']:.1f} s"]
    return "\n".join(lines)


def _batch_lines(res: dict) -> list[str]:
    b = res["batch"]
    lines = ["", "Batch (pellucid batch subprocess, per-spectrum throughput)"]
    if "skipped" in b:
        lines.append(f"  skipped: {b['skipped']}")
    elif "failed" in b:
        lines.append(f"  failed: {b['failed']}")
    else:
        lines.append(f"  {b['inputs']}; {b['jobs']} jobs; exports {', '.join(b['exports'])}, "
                     f"no per-spectrum figures")
        lines.append(f"  {'spectra':>7s}{'wall s':>9s}{'spectra/s':>11s}{'s/spectrum':>12s}"
                     f"{'peak RSS MB (all / main)':>27s}")
        for r in b["runs"]:
            lines.append(f"  {r['spectra']:7d}{r['wall_s']:9.2f}{r['spectra_per_s']:11.2f}"
                         f"{r['seconds_per_spectrum']:12.3f}"
                         f"{r['peak_tree_rss_bytes'] / 2 ** 20:17.0f} / "
                         f"{r.get('peak_main_rss_bytes', 0) / 2 ** 20:.0f}")
        if "seconds_per_spectrum_slope" in b:
            lines.append(f"  linear fit {b['seconds_per_spectrum_slope']:.3f} s per spectrum + "
                         f"{b['startup_s']:.2f} s start-up; log-log slope of wall time "
                         f"{b['slope_loglog']:.2f} over all runs, "
                         f"{b['slope_loglog_upper']:.2f} between the two largest (1 = linear)")
            if b.get("peak_rss_ratio_last_first"):
                lines.append(f"  peak RSS {b['runs'][-1]['spectra']} vs "
                             f"{b['runs'][0]['spectra']} spectra: "
                             f"x{b['peak_rss_ratio_last_first']:.2f} (1 = flat)")
        ref = b.get("reference_s_per_spectrum_one_process")
        if ref:
            lines.append(f"  reference (same run): one spectrum read, fitted and exported in "
                         f"this process {ref:.3f} s; ideal {b['jobs'] / ref:.2f} spectra/s on "
                         f"{b['jobs']} jobs; batch efficiency "
                         f"{b.get('efficiency', math.nan):.0%}")
            if b.get("reference_inputs"):
                lines.append(f"  reference time: mean over the {b['reference_inputs']} distinct "
                             f"input spectra the batch cycles through (their fits differ)")
        fig = b.get("with_figures")
        if fig and "spectra_per_s" in fig:
            r = fig["runs"][0]
            base = b["runs"][0]
            lines.append(f"  with the recipe's per-spectrum figures: {r['spectra']} spectra "
                         f"{r['wall_s']:.2f} s, {fig['spectra_per_s']:.2f} spectra/s (x"
                         f"{r['seconds_per_spectrum'] / base['seconds_per_spectrum']:.1f} the "
                         f"time per spectrum of the {base['spectra']}-spectrum run)")
    return lines


def _target_lines(res: dict) -> list[str]:
    if not res.get("targets"):
        return []
    lines = ["", "Targets (2-core machine)"]
    for k, v in res["targets"].items():
        val = v.get("value_s", v.get("value"))
        lines.append(f"  {k:50s} {val:12.4g}  {'met' if v['met'] else 'NOT met'}")
    return lines


def _counts(text: str) -> tuple[int, ...]:
    try:
        counts = tuple(int(x) for x in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r}: give whole numbers separated by commas, "
                                         f"e.g. 10,100,1000,2000") from None
    if not counts or min(counts) < 1:
        raise argparse.ArgumentTypeError(f"{text!r}: every count must be at least 1")
    return counts


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m fitting.bench",
                                     description="Measure the speed of Pellucid on this machine.")
    parser.add_argument("--out", default="bench_results.json",
                        help="JSON file to write (default: bench_results.json)")
    parser.add_argument("--quick", action="store_true", help="tiny sizes, a few seconds")
    parser.add_argument("--skip-batch", action="store_true",
                        help="leave out the 'pellucid batch' subprocess runs")
    parser.add_argument("--repeat", type=int, default=None, metavar="N",
                        help="timed calls per forward-model measurement")
    parser.add_argument("--batch-counts", type=_counts, default=None, metavar="N,N,...",
                        help="spectra per batch run (default 10,50,200; the full linearity "
                             "check is 10,100,1000,2000)")
    parser.add_argument("--batch-figures", type=int, default=None, metavar="N",
                        help="spectra in the run with per-spectrum figures (0 = none)")
    parser.add_argument("--batch-only", action="store_true",
                        help="only the batch part (no forward, scaling or fit timing)")
    args = parser.parse_args(argv)
    if args.repeat is not None and args.repeat < 1:
        parser.error("--repeat must be at least 1")
    res = run_benchmark(quick=args.quick, skip_batch=args.skip_batch, repeat=args.repeat,
                        batch_counts=args.batch_counts, batch_figures=args.batch_figures,
                        batch_only=args.batch_only)
    print(format_report(res))
    path = atomic_write_json(args.out, json_safe(res))
    print(f"results written to {path}")
    return 0 if res["all_agree"] else 1


if __name__ == "__main__":
    sys.exit(main())
