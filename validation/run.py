"""Fit every validation case from the defaults a technician gets, and report how it went.

Usage::

    python -m validation.run [--quick] [--only PATTERN] [--markdown] [--json FILE]
                             [--jobs N] [--list]

Each case's spectrum is made by :mod:`validation.synth` (``tmm``, published n, κ,
instrument errors) and fitted exactly the way the app and a batch do it::

    rec = Recipe(default_stack(model, substrate_key))
    res = fit_spectrum(spectrum, rec.new_stack(), rec.make_fit_options(spectrum))

The table gives, per case, the true and fitted thickness and n(633 nm), the
fit's verdict and whether the result is recovered (thickness within 1 % and
n(633) within 0.01). The summary counts

* recovered ordinary films (the criteria of issue 11 apply to them),
* grossly wrong results: |Δd| > 5 % or |Δn(633)| > 0.05,
* silent failures: grossly wrong with the verdict "good",
* quiet misses: not recovered, yet "good".

The verdict is ``FitResult.verdict`` where the engine provides it; until then
it is "good" for a converged fit without warnings and "check" otherwise (the
output says which source was used).

Exit status: 0 when there is no silent failure and every ordinary case is
recovered, 1 otherwise, 2 for a usage error.
"""

from __future__ import annotations

import argparse
import multiprocessing
import platform
import sys
import time
import traceback

import numpy as np

from .cases import Case, select
from .materials import material, substrate
from .synth import grid, measure

__all__ = ["evaluate", "summarise", "main", "RECOVER_D_PCT", "RECOVER_N", "GROSS_D_PCT",
           "GROSS_N"]

#: Recovery criteria of issue 11 (ordinary films).
RECOVER_D_PCT, RECOVER_N = 1.0, 0.01
#: A result this far off is grossly wrong.
GROSS_D_PCT, GROSS_N = 5.0, 0.05
REF_NM = 633.0


def _verdict(res) -> tuple[str, str]:
    """(verdict, where it came from)."""
    v = getattr(res, "verdict", None)
    if v is not None:
        return str(v), "engine"
    return ("good" if res.success and not res.warnings else "check"), "fallback"


def _cauchy_floor(case: Case) -> float | None:
    """Largest |n - (A + B/λ²)| of the true film index over the range (least squares).

    How well the default two-term Cauchy can describe the real material at all:
    a floor on the n error of a perfect fit, independent of the engine.
    """
    if case.model != "cauchy":
        return None
    wl = grid(*case.range_nm)
    n = material(case.material).N(wl).real
    X = np.column_stack([np.ones_like(wl), (wl * 1e-3) ** -2])
    coef, *_ = np.linalg.lstsq(X, n, rcond=None)
    return float(np.max(np.abs(X @ coef - n)))


def evaluate(case: Case) -> dict:
    """Make one case's spectrum, fit it from the defaults, and compare with the truth."""
    from fitting.errors import PellucidError
    from fitting.fit import fit_spectrum
    from fitting.presets import default_stack
    from fitting.recipe import Recipe
    from fitting.spectrum import Spectrum

    film = material(case.material)
    wl = grid(*case.range_nm)
    t0 = time.perf_counter()
    T, _ = measure(film, case.thickness_nm, substrate(case.substrate), wl, case.instrument,
                   case.seed)
    gen_s = time.perf_counter() - t0
    n_true = film.n(REF_NM) if wl[0] <= REF_NM <= wl[-1] else None
    row = {"case": case.name, "material": case.material, "source": film.source,
           "substrate": case.substrate, "range_nm": list(case.range_nm),
           "errors": case.errors, "instrument": case.instrument.describe(), "seed": case.seed,
           "model": case.model, "ordinary": case.ordinary, "why": case.why,
           "d_true": case.thickness_nm, "n633_true": n_true, "generate_s": gen_s,
           "cauchy_floor": _cauchy_floor(case)}
    spectrum = Spectrum(wl, T, name=case.name)
    try:
        rec = Recipe(default_stack(case.model, case.substrate))
        t0 = time.perf_counter()
        res = fit_spectrum(spectrum, rec.new_stack(), rec.make_fit_options(spectrum))
        row["fit_s"] = time.perf_counter() - t0
    except PellucidError as e:
        row.update(verdict="refused", verdict_source="engine", error=str(e))
        return _judge(row)
    except Exception as e:  # noqa: BLE001 - a crash is a finding, not a reason to stop
        row.update(verdict="error", verdict_source="engine",
                   error=f"{type(e).__name__}: {e}", traceback=traceback.format_exc())
        return _judge(row)
    d_fit = res.thickness()[0]
    n_fit = res.optical["film"].at(REF_NM)[0] if n_true is not None else None
    verdict, source = _verdict(res)
    u = (getattr(res, "uncertainty", None) or {}).get("film_thickness")
    row["d_U"] = float(u.expanded) if u is not None and np.isfinite(u.expanded) else None
    row.update(d_fit=d_fit, n633_fit=n_fit, verdict=verdict, verdict_source=source,
               verdict_reasons=list(getattr(res, "verdict_reasons", ()) or ()),
               success=bool(res.success), message=res.message, redchi=float(res.redchi),
               warnings=list(res.warnings),
               alternatives=[a.thickness_nm for a in res.alternatives],
               nuisance={k: p.value for k, p in res.params.items()
                         if k in ("scale", "offset", "thickness_spread") and p.vary},
               params={k: p.value for k, p in res.params.items() if p.vary})
    return _judge(row)


def _judge(row: dict) -> dict:
    """Add Δd %, Δn, recovered, gross, silent and quiet flags to a result row."""
    d_fit, n_fit, n_true = row.get("d_fit"), row.get("n633_fit"), row.get("n633_true")
    fitted = d_fit is not None
    dd = 100 * (d_fit - row["d_true"]) / row["d_true"] if fitted else None
    dn = (n_fit - n_true) if (fitted and n_true is not None and n_fit is not None
                              and np.isfinite(n_fit)) else None
    recovered = fitted and abs(dd) <= RECOVER_D_PCT and (dn is None or abs(dn) <= RECOVER_N)
    gross = fitted and (abs(dd) > GROSS_D_PCT or (dn is not None and abs(dn) > GROSS_N))
    good = row["verdict"] == "good"
    # Does the expanded uncertainty (GUM, k = 2) reach the true thickness?
    U = row.get("d_U")
    row["covered"] = None if not fitted or U is None else bool(
        abs(d_fit - row["d_true"]) <= U)
    row.update(dd_pct=dd, dn=dn, recovered=bool(recovered), gross=bool(gross),
               silent=bool(gross and good), quiet=bool(fitted and not recovered and good))
    return row


def summarise(rows: list[dict]) -> dict:
    ordinary = [r for r in rows if r["ordinary"]]
    names = lambda flag: [r["case"] for r in rows if r[flag]]  # noqa: E731
    sources = sorted({r["verdict_source"] for r in rows})
    return {
        "cases": len(rows),
        "ordinary": len(ordinary),
        "ordinary_recovered": sum(r["recovered"] for r in ordinary),
        "ordinary_missed": [r["case"] for r in ordinary if not r["recovered"]],
        "recovered_all": sum(r["recovered"] for r in rows),
        "ordinary_covered": sum(bool(r.get("covered")) for r in ordinary),
        "ordinary_uncovered": [r["case"] for r in ordinary if r.get("covered") is False],
        "gross": names("gross"),
        "silent": names("silent"),
        "quiet": names("quiet"),
        "refused": [r["case"] for r in rows if r["verdict"] in ("refused", "error")],
        "verdict_source": sources,
        "fit_s_total": sum(r.get("fit_s", 0.0) for r in rows),
        "generate_s_total": sum(r["generate_s"] for r in rows),
    }


# ---------------------------------------------------------------------------------
# Output
_HEAD = ("case", "model", "ord", "d true", "d fit", "Δd %", "n633 true", "n633 fit", "Δn",
         "verdict", "recovered", "fit s")


def _cells(r: dict) -> list[str]:
    f = lambda v, fmt: "—" if v is None else format(v, fmt)  # noqa: E731
    flag = " SILENT" if r["silent"] else (" gross" if r["gross"] else "")
    return [r["case"], r["model"], "yes" if r["ordinary"] else "no", f(r["d_true"], ".0f"),
            f(r.get("d_fit"), ".1f"), f(r["dd_pct"], "+.2f"), f(r["n633_true"], ".4f"),
            f(r.get("n633_fit"), ".4f"), f(r["dn"], "+.4f"), r["verdict"] + flag,
            "yes" if r["recovered"] else "no", f(r.get("fit_s"), ".1f")]


def format_table(rows: list[dict], markdown: bool = False) -> str:
    body = [_cells(r) for r in rows]
    if markdown:
        lines = ["| " + " | ".join(_HEAD) + " |",
                 "|" + "|".join("---" if i < 3 or i == 9 else "---:" for i in range(len(_HEAD)))
                 + "|"]
        lines += ["| " + " | ".join(c) + " |" for c in body]
        return "\n".join(lines)
    widths = [max(len(h), *(len(c[i]) for c in body)) for i, h in enumerate(_HEAD)]
    fmt = lambda cells: "  ".join(c.ljust(w) if i in (0, 1, 2, 9) else c.rjust(w)  # noqa: E731
                                  for i, (c, w) in enumerate(zip(cells, widths)))
    return "\n".join([fmt(_HEAD), fmt(["-" * w for w in widths])] + [fmt(c) for c in body])


def format_summary(s: dict, markdown: bool = False) -> str:
    b = "- " if markdown else ""
    lst = lambda xs: (": " + ", ".join(xs)) if xs else ""  # noqa: E731
    src = ("FitResult.verdict" if s["verdict_source"] == ["engine"] else
           "fallback: 'good' = converged without warnings, else 'check' "
           "(FitResult.verdict not available)")
    return "\n".join([
        f"{b}ordinary films recovered (thickness within {RECOVER_D_PCT:g} %, n(633) within "
        f"{RECOVER_N:g}): {s['ordinary_recovered']}/{s['ordinary']}"
        + (f" (missed: {', '.join(s['ordinary_missed'])})" if s["ordinary_missed"] else ""),
        f"{b}ordinary films whose thickness error is within the expanded uncertainty "
        f"(GUM, k = 2; about 95 % expected): {s['ordinary_covered']}/{s['ordinary']}"
        + (f" (outside: {', '.join(s['ordinary_uncovered'])})" if s["ordinary_uncovered"]
           else ""),
        f"{b}grossly wrong (|Δd| > {GROSS_D_PCT:g} % or |Δn(633)| > {GROSS_N:g}): "
        f"{len(s['gross'])}/{s['cases']}{lst(s['gross'])}",
        f"{b}silent failures (grossly wrong, verdict 'good'): {len(s['silent'])}"
        f"{lst(s['silent'])}",
        f"{b}quiet misses (not recovered, verdict 'good'): {len(s['quiet'])}{lst(s['quiet'])}",
        f"{b}refused or crashed: {len(s['refused'])}{lst(s['refused'])}",
        f"{b}verdict source: {src}",
        f"{b}time: fitting {s['fit_s_total']:.1f} s, generating spectra with tmm "
        f"{s['generate_s_total']:.1f} s (sums over cases)",
    ])


def _meta() -> dict:
    import scipy
    import tmm

    import fitting
    return {"pellucid": getattr(fitting, "__version__", "?"),
            "tmm": getattr(tmm, "__version__", "?"), "numpy": np.__version__,
            "scipy": scipy.__version__, "python": platform.python_version()}


def run(cases: list[Case], jobs: int = 2, progress=None) -> list[dict]:
    """Evaluate cases, over ``jobs`` processes; rows in the order of ``cases``."""
    rows = []
    if jobs > 1 and len(cases) > 1:
        with multiprocessing.get_context("spawn").Pool(min(jobs, len(cases))) as pool:
            for i, row in enumerate(pool.imap(evaluate, cases)):
                rows.append(row)
                if progress:
                    progress(i + 1, len(cases), row)
    else:
        for i, case in enumerate(cases):
            rows.append(evaluate(case))
            if progress:
                progress(i + 1, len(cases), rows[-1])
    return rows


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(
        prog="python -m validation.run",
        description="Fit the validation spectra (published n, κ; tmm; ordinary instrument "
                    "errors) from the default setup and report recovery and verdicts.")
    ap.add_argument("--quick", action="store_true", help="only the representative subset")
    ap.add_argument("--only", metavar="PATTERN",
                    help="cases whose name contains PATTERN (or matches a * ? pattern)")
    ap.add_argument("--markdown", action="store_true", help="print the table in Markdown")
    ap.add_argument("--json", metavar="FILE", help="also write every row and the summary")
    ap.add_argument("--jobs", type=int, default=2, help="worker processes (default 2)")
    ap.add_argument("--list", action="store_true", help="list the cases and stop")
    a = ap.parse_args(argv)
    cases = select(a.only, quick=a.quick)
    if not cases:
        ap.error(f"no case matches {a.only!r}; see --list")
    if a.list:
        for c in cases:
            print(f"{c.name:30s} {c.model:14s} {'ordinary' if c.ordinary else 'hard':8s} "
                  f"{c.instrument.describe():45s} {c.why}")
        return 0

    def progress(i, n, r):
        print(f"[{i}/{n}] {r['case']}: {r['verdict']}", file=sys.stderr, flush=True)

    rows = run(cases, max(1, a.jobs), progress)
    s = summarise(rows)
    print(format_table(rows, a.markdown))
    print()
    print(format_summary(s, a.markdown))
    if a.json:
        from fitting.atomic import atomic_write_json
        from fitting.jsonsafe import json_safe
        atomic_write_json(a.json, json_safe({"meta": _meta(), "summary": s, "cases": rows}),
                          indent=1)
    return 0 if not s["silent"] and not s["ordinary_missed"] else 1


if __name__ == "__main__":
    sys.exit(main())
