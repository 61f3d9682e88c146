"""The ``pellucid`` command: simulate, fit one spectrum, run a batch, run the demo, open the app.

Run ``pellucid --help`` or ``pellucid <command> --help`` for the options. User
errors (bad files, invalid recipes) print one message on stderr and return a
non-zero exit status, never a traceback. This module, like all of ``fitting``,
never imports Qt: ``pellucid gui`` loads the desktop app by name at run time.
"""

from __future__ import annotations

import argparse
import atexit
import importlib
import math
import os
import shutil
import signal
import sys
import threading
import time
from datetime import UTC, datetime
from pathlib import Path

from . import __version__
from .errors import PellucidError

EXIT_OK, EXIT_SOME_FAILED, EXIT_ERROR, EXIT_CHECK = 0, 1, 2, 3
EXIT_INTERRUPTED, EXIT_TERMINATED = 130, 143

_FIT_EPILOG = """\
exit status:
  0    fitted, and the fit's verdict is good (or the engine gives no verdict)
  3    fitted, but the verdict is 'check' or 'poor': read the reasons in the report
  1    the fit failed (did not converge)
  2    usage or input error (bad option, recipe, spectrum or output folder)
"""

_BATCH_EPILOG = """\
exit status:
  0    every spectrum was fitted and every verdict is good
  3    every spectrum was fitted, but some verdicts are 'check' or 'poor'
  1    some spectra failed, or the batch stopped early (e.g. a full disk);
       see the 'status' and 'reason' columns of summary.csv
  2    no spectrum was fitted, or a usage error (bad option, recipe or input path)
  130  interrupted (Ctrl-C); 143: stopped by SIGTERM (a job scheduler, 'timeout');
       finished spectra are kept, rerun with --resume

output folder (new, empty, or one an earlier batch wrote; a user's own files in it
are never overwritten):
  summary.csv, summary.json     one row per spectrum, rebuilt from the per-spectrum
                                results when the batch ends (after Ctrl-C too)
  report.pdf                    the batch report (written at the end)
  recipe.json                   the exact recipe used (recipes/ if several)
  spectra/<stem>-<hash>/        each spectrum's exports; result.json is written last
                                and marks the spectrum as done for --resume

manifest (--manifest FILE.csv): one line per spectrum file, folder or pattern with
its recipe, paths relative to the manifest; first matching line wins:
  file,recipe
  line3/*.csv,titania.json
  line4/,nitride.json

--scheduler: Dask moves tasks and results with pickle; anyone who can reach the
scheduler can run code on its workers and forge results. Use only a cluster you
control (on a trusted network, or with TLS).
"""


class _UsageError(PellucidError):
    pass


# ---------------------------------------------------------------------------------
def _parse_range(text: str):
    """'START:STOP:STEP' in nm -> wavelength grid (STOP included when on the grid)."""
    import numpy as np
    parts = text.split(":")
    if len(parts) != 3:
        raise _UsageError(f"--range {text!r}: expected START:STOP:STEP in nm, e.g. 300:1100:1")
    try:
        start, stop, step = (float(p) for p in parts)
    except ValueError:
        raise _UsageError(f"--range {text!r}: START, STOP and STEP must be numbers") from None
    if not all(math.isfinite(x) for x in (start, stop, step)):
        raise _UsageError(f"--range {text!r}: values must be finite")
    if start <= 0 or stop <= start or step <= 0:
        raise _UsageError(f"--range {text!r}: need 0 < START < STOP and STEP > 0 (nm)")
    n = int(math.floor((stop - start) / step + 1e-9)) + 1
    if n > 1_000_000:
        raise _UsageError(f"--range {text!r}: {n} points is too many (at most 1,000,000)")
    return start + step * np.arange(n)


def _positive_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {v}")
    return v


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="pellucid",
        description="Thin-film thickness and n, κ from UV-Vis-NIR transmission spectra. "
                    "Without a command, opens the desktop app.")
    p.add_argument("--version", action="version", version=f"pellucid {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    s = sub.add_parser("simulate", help="forward T and R of a recipe's stack, as CSV",
                       description="Compute T and R of the recipe's layer stack at its stored "
                                   "parameter values (geometry from the recipe's fit options) "
                                   "and write them as CSV.")
    s.add_argument("recipe", metavar="RECIPE", help="recipe file (.json)")
    s.add_argument("--range", required=True, metavar="START:STOP:STEP",
                   help="wavelength grid in nm, e.g. 300:1100:2")
    s.add_argument("--out", metavar="FILE",
                   help="CSV file to write (default: standard output); an existing file is "
                        "replaced only if it is an earlier simulation")

    f = sub.add_parser("fit", help="fit one spectrum and write all exports",
                       description="Fit one spectrum with a recipe; write the exports the "
                                   "recipe asks for into DIR and print the fit report.",
                       epilog=_FIT_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    f.add_argument("spectrum", metavar="SPECTRUM", help="spectrum file")
    f.add_argument("--recipe", required=True, metavar="RECIPE", help="recipe file (.json)")
    f.add_argument("--out", required=True, metavar="DIR", help="folder for the exports")
    f.add_argument("--no-figures", action="store_true",
                   help="leave out the figures even if the recipe asks for them")
    f.add_argument("--suggest-model", action="store_true",
                   help="also fit the other film models the data make plausible, rank them "
                        "by the Bayesian information criterion (BIC), print the ranking and "
                        "keep the best (as the recipe's fit.suggest_model: true does); takes "
                        "one fit per candidate, typically 3-4 times as long")

    b = sub.add_parser("batch", help="fit many spectra with one recipe (or several)",
                       description="Fit every spectrum with its recipe, in parallel. A bad "
                                   "file is recorded with its reason and the batch goes on.",
                       epilog=_BATCH_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    b.add_argument("inputs", nargs="*", metavar="INPUTS",
                   help="spectrum files, folders or glob patterns (quote them: 'runs/*.csv')")
    b.add_argument("--recipe", metavar="RECIPE", help="recipe file (.json) for the INPUTS")
    b.add_argument("--manifest", metavar="FILE",
                   help="CSV file with the columns file,recipe: a recipe per file, folder or "
                        "pattern (several products in one run; see below)")
    b.add_argument("--out", required=True, metavar="DIR", help="output folder")
    b.add_argument("--jobs", type=_positive_int, metavar="N",
                   help="worker processes (default: all cores; 1 = in this process)")
    b.add_argument("--resume", action="store_true",
                   help="skip spectra already done with the same recipe (start values "
                        "aside) and input file")
    b.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on an existing, trusted Dask distributed cluster, e.g. "
                        "tcp://10.0.0.5:8786 (workers must see the input and output folders "
                        "at the same paths; see below)")
    b.add_argument("--no-report", action="store_true", help="do not write report.pdf")
    b.add_argument("--no-figures", action="store_true",
                   help="no per-spectrum figures even if the recipe asks for them (much "
                        "faster; the report's summary figures are still drawn)")

    d = sub.add_parser("demo", help="run the batch on the shipped demo spectra",
                       description="Fit the invented demo spectra in demo_data/ with "
                                   "demo_data/recipe.json and print where the report is.")
    d.add_argument("--out", metavar="DIR", default="pellucid-demo",
                   help="output folder (default: ./pellucid-demo)")
    d.add_argument("--jobs", type=_positive_int, metavar="N", help="worker processes")

    g = sub.add_parser("gui", help="open the desktop app (the default); "
                                   "'pellucid gui --help' lists its options")
    g.add_argument("project", nargs="?", metavar="PROJECT", help="project file to open")
    return p


# ---------------------------------------------------------------------------------
def _simulate(args, out) -> int:
    from .recipe import load_recipe, recipe_hash
    recipe = load_recipe(args.recipe)
    wl = _parse_range(args.range)
    opts = recipe.fit_options
    angle = float(opts.get("angle_deg", 0.0) or 0.0)
    pol = opts.get("polarization", "u") or "u"
    R, T = recipe.stack.RT(wl, angle_deg=angle, polarization=pol)
    lines = [f"# software: pellucid {__version__}",
             f"# recipe: {Path(args.recipe)}",
             f"# recipe_name: {' '.join(recipe.name.split())}",
             f"# recipe_hash: {recipe_hash(recipe)}",
             f"# created: {datetime.now(UTC).isoformat(timespec='seconds')}",
             f"# angle_deg: {angle:g}", f"# polarization: {pol}",
             "# columns: wavelength in nm; T and R as fractions (1.0 = 100 %)",
             "wavelength_nm,T,R"]
    lines += [f"{w:.10g},{t:.10g},{r:.10g}" for w, t, r in zip(wl, T, R)]
    text = "\n".join(lines) + "\n"
    if args.out:
        from .atomic import atomic_write_text
        _refuse_overwrite(Path(args.out), Path(args.recipe))
        atomic_write_text(Path(args.out), text)
        print(f"wrote {len(wl)} wavelengths to {args.out}", file=sys.stderr)
    else:
        out.write(text)
    return EXIT_OK


_SIMULATION_HEAD = b"# software: pellucid"


def _refuse_overwrite(target: Path, recipe: Path) -> None:
    """Never replace the recipe itself, nor a file that is not an earlier simulation."""
    if target.is_dir():
        raise _UsageError(f"--out {target} is a folder; give a file name for the CSV")
    if not target.exists():
        return
    if recipe.exists() and os.path.samefile(target, recipe):
        raise _UsageError(f"--out {target} is the recipe file itself; give another file "
                          f"name for the simulated spectrum")
    try:
        with open(target, "rb") as fh:
            head = fh.read(len(_SIMULATION_HEAD))
    except OSError:
        head = b""
    if head != _SIMULATION_HEAD:
        raise _UsageError(f"--out {target} exists and is not an earlier Pellucid simulation; "
                          f"it is not overwritten: give another file name, or delete it first")


def _fit(args, out) -> int:
    from . import batch
    from .recipe import load_recipe
    from .spectrum import sha256_of_file
    recipe = load_recipe(args.recipe)
    if getattr(args, "no_figures", False) and "plots" in recipe.exports:
        import dataclasses
        recipe = dataclasses.replace(recipe, exports=tuple(e for e in recipe.exports
                                                           if e != "plots"))
    path = Path(args.spectrum)
    if path.is_dir():
        raise _UsageError(f"{path} is a folder; 'pellucid fit' takes one spectrum file, "
                          f"use 'pellucid batch {path} --recipe ... --out ...' for a folder")
    if not path.is_file():
        raise _UsageError(f"{path}: no such file; check the path")
    outdir = Path(args.out)
    if outdir.exists() and not outdir.is_dir():
        raise _UsageError(f"--out {outdir} is a file; give a folder for the exports")
    if getattr(args, "suggest_model", False) and not recipe.suggest_model:
        import dataclasses
        recipe = dataclasses.replace(recipe, suggest_model=True)
    prep = batch.Prepared(recipe.resolved())        # reads the recipe's reference files
    spectrum = prep.spectrum(path)
    result, suggestion = prep.fit(spectrum)
    outdir.mkdir(parents=True, exist_ok=True)
    # Say what was fitted: a reflectance file fits as R under an "auto" reader setting.
    what = 'transmittance T' if spectrum.quantity == 'T' else 'reflectance R'
    ref = " after dividing by the 100 % line" if prep.reference else ""
    out.write(f"fitted {what} of {path.name} ({len(spectrum)} points){ref}\n")
    if suggestion is not None:
        out.write(suggestion.ranking_table() + "\n\n")
    prov = prep.provenance(path, sha256_of_file(path))
    files = batch._export(result, outdir, batch.export_stem(path), prov, prep.recipe)
    out.write(result.report() + "\n")
    if files:
        out.write(f"\nwrote {len(files)} files to {outdir}\n")
    else:
        out.write("\nno exports written (none chosen in the recipe or no export module)\n")
    if not result.success:
        return EXIT_SOME_FAILED
    verdict, reasons = batch.result_verdict(result)
    if verdict in ("check", "poor"):
        out.write(f"verdict: {verdict}" + "".join(f"\n  - {r}" for r in reasons) + "\n")
        return EXIT_CHECK
    if verdict:
        out.write(f"verdict: {verdict}\n")
    return EXIT_OK


class _Progress:
    """A one-line bar on a terminal, plain log lines otherwise."""

    def __init__(self, stream, total: int, t0: float):
        self.stream, self.total = stream, total
        self.tty = hasattr(stream, "isatty") and stream.isatty()
        self.t0 = t0
        self.fitted = 0
        self.counts = {"ok": 0, "failed": 0, "error": 0}

    def __call__(self, step):
        self.counts[step.status] = self.counts.get(step.status, 0) + 1
        if step.status == "ok" and step.verdict in ("check", "poor"):
            self.counts["check"] = self.counts.get("check", 0) + 1
        if step.skipped:
            self.t0 = time.monotonic()      # the rate counts spectra fitted in this run
        else:
            self.fitted += 1
        elapsed = max(time.monotonic() - self.t0, 1e-9)
        rate = self.fitted / elapsed
        left = step.total - step.done
        eta = _hms(left / rate) if rate > 0 and left else "0:00:00" if not left else "--:--:--"
        name = step.path.name
        if self.tty:
            width = 28
            fill = int(width * step.done / max(step.total, 1))
            bad = self.counts.get("failed", 0) + self.counts.get("error", 0)
            check = self.counts.get("check", 0)
            line = (f"\r[{'#' * fill}{'.' * (width - fill)}] {step.done}/{step.total}  "
                    f"{rate:.2f} spectra/s  ETA {eta}  failed {bad}"
                    f"{f'  to check {check}' if check else ''}  {name[:30]}")
            # Never wider than the terminal, or the bar wraps onto new lines.
            cols = max(40, shutil.get_terminal_size((100, 24)).columns - 1)
            self.stream.write(line.ljust(cols)[:cols])
            if step.done == step.total:
                self.stream.write("\n")
        else:
            what = step.reason if step.status != "ok" else _headline(step.row)
            # Reader messages start with the file name, already on the line.
            what = what.removeprefix(f"{step.path}, ").removeprefix(f"{step.path}: ")
            word = step.status
            if step.status == "ok" and step.verdict and step.verdict != "good":
                word = f"ok, {step.verdict}"
            if step.skipped:             # not fitted now: say so, whatever its old status
                word = f"skipped (done earlier, {word})"
            self.stream.write(f"[{step.done}/{step.total}] {word:<6} {step.path}"
                              f"{': ' + what if what else ''}  ({rate:.2f}/s, ETA {eta})\n")
        self.stream.flush()

    def close(self):
        if self.tty:
            self.stream.write("\n")
            self.stream.flush()


def _hms(seconds: float) -> str:
    s = int(round(seconds))
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}"


def _headline(row) -> str:
    from .labels import format_pm
    for k, v in row.items():
        if k.endswith("_thickness") and isinstance(v, (int, float)):
            return f"{k} = {format_pm(v, row.get(f'{k}_sigma'), 'nm', sigma_fmt='.2g')}"
    return ""


class _Terminated(KeyboardInterrupt):
    """SIGTERM, turned into the same orderly stop as Ctrl-C."""


class _SigtermStops:
    """While active, SIGTERM (job schedulers, ``timeout``, ``kill``) raises
    :class:`_Terminated` in the main thread, so a batch stops like Ctrl-C:
    workers ended, summary written, lock released, resume explained."""

    def __enter__(self):
        self.old = None
        if threading.current_thread() is threading.main_thread() and hasattr(signal, "SIGTERM"):
            def handler(signum, frame):
                raise _Terminated()
            self.old = signal.signal(signal.SIGTERM, handler)
        return self

    def __exit__(self, *exc):
        if self.old is not None:
            signal.signal(signal.SIGTERM, self.old)
        return False


def _batch_inputs(args, inputs, recipe_path):
    """(inputs, recipe) for iter_batch from INPUTS/--recipe and/or --manifest."""
    from .batch import read_manifest
    from .recipe import load_recipe
    inputs = list(inputs or getattr(args, "inputs", None) or [])
    recipe_path = recipe_path or getattr(args, "recipe", None)
    manifest = getattr(args, "manifest", None)
    if not inputs and not manifest:
        raise _UsageError("give the spectra (INPUTS with --recipe) or a --manifest file")
    if inputs and not recipe_path:
        raise _UsageError("--recipe is needed for the INPUTS (or list them in a --manifest "
                          "with their recipes)")
    if recipe_path and not inputs:
        raise _UsageError("--recipe was given but no INPUTS to apply it to")
    recipe = load_recipe(recipe_path) if recipe_path else None
    pairs = read_manifest(manifest) if manifest else []
    return inputs + pairs, recipe


def _batch(args, out, err, *, inputs=None, recipe_path=None, outdir=None) -> int:
    if not getattr(args, "scheduler", None):
        # Before the imports below: the workers' modules load on another core meanwhile.
        from .pool import start_workers_early
        start_workers_early(args.jobs)
    from .batch import iter_batch
    items, recipe = _batch_inputs(args, inputs, recipe_path)
    outdir = Path(outdir or args.out)
    gen = iter_batch(items, recipe, outdir, jobs=args.jobs,
                     resume=getattr(args, "resume", False),
                     scheduler=getattr(args, "scheduler", None),
                     report=not getattr(args, "no_report", False),
                     figures=not getattr(args, "no_figures", False))
    progress, t0 = None, time.monotonic()
    try:
        with _SigtermStops():
            while True:
                try:
                    step = next(gen)
                except StopIteration as e:
                    summary = e.value
                    break
                if progress is None:
                    progress = _Progress(err, step.total, t0)
                progress(step)
    except KeyboardInterrupt as e:
        gen.close()             # ends the workers, writes the summary of what is finished
        if progress is not None and progress.tty:
            err.write("\n")
        how = "stopped by SIGTERM" if isinstance(e, _Terminated) else "interrupted"
        err.write(f"pellucid: {how}; finished spectra are kept in {outdir} (summary.csv lists "
                  f"them). Rerun the same command with --resume to continue.\n")
        return EXIT_TERMINATED if isinstance(e, _Terminated) else EXIT_INTERRUPTED
    c, v = summary.counts, summary.verdicts
    skipped = f", {summary.skipped} of them done earlier" if summary.skipped else ""
    checks = v.get("check", 0) + v.get("poor", 0)
    verdicts = (f" (verdicts: {v.get('good', 0)} good, {v.get('check', 0)} check, "
                f"{v.get('poor', 0)} poor)" if sum(v.values()) else "")
    out.write(f"{summary.total} spectra: {c.get('ok', 0)} ok{skipped}{verdicts}, "
              f"{c.get('failed', 0)} failed, {c.get('error', 0)} errors "
              f"({summary.elapsed_s:.1f} s)\n")
    if summary.summary_csv.is_file():
        out.write(f"summary: {summary.summary_csv}\n")
    for pdf in summary.report_pdfs:
        out.write(f"report:  {pdf}\n")
    if checks:
        out.write(f"{checks} fitted spectra need checking: see the 'verdict' and "
                  f"'verdict_reasons' columns\n")
    if summary.ignored:
        names = ", ".join(p.name for p in summary.ignored[:5])
        more = f" and {len(summary.ignored) - 5} more" if len(summary.ignored) > 5 else ""
        err.write(f"pellucid: note: {len(summary.ignored)} files in the input folders are not "
                  f"spectra and were left out: {names}{more}\n")
    if summary.halted:
        err.write(f"pellucid: the batch stopped: {summary.halted}. The finished spectra are "
                  f"kept; make room, then rerun the same command with --resume.\n")
    for w in summary.warnings:
        err.write(f"pellucid: warning: {w}\n")
    if summary.report_error:
        err.write(f"pellucid: warning: {summary.report_error}\n")
    return summary.exit_code


def demo_data_dir() -> Path:
    """The shipped demo_data/ folder (beside the fitting package in a checkout)."""
    return Path(__file__).resolve().parent.parent / "demo_data"


def _demo_sets(root: Path) -> list[tuple[str, Path, Path]]:
    """(label, spectra folder, recipe) of the main demo set and of each sub-set folder."""
    sets = []
    for folder in [root, *sorted(p for p in root.iterdir() if p.is_dir())]:
        recipe = folder / "recipe.json"
        if recipe.is_file():
            spectra = folder / "spectra" if (folder / "spectra").is_dir() else folder
            sets.append(("" if folder == root else folder.name, spectra, recipe))
    return sets


def _demo(args, out, err) -> int:
    root = demo_data_dir()
    recipe = root / "recipe.json"
    if not recipe.is_file():
        raise PellucidError(f"the demo data are not installed: {recipe} is missing. Run the "
                            f"demo from a Pellucid source checkout that has demo_data/.")
    # The main set goes to --out itself; each further set (a demo_data/ sub-folder with
    # its own recipe, e.g. another film on another glass) to a sub-folder of it.
    codes, reports = [], []
    for label, spectra, recipe in _demo_sets(root):
        outdir = Path(args.out) / label if label else Path(args.out)
        out.write(f"demo: fitting the spectra in {spectra} with {recipe}\n")
        codes.append(_batch(args, out, err, inputs=[spectra], recipe_path=recipe,
                            outdir=outdir))
        if codes[-1] == EXIT_INTERRUPTED:
            return EXIT_INTERRUPTED
        if (outdir / "report.pdf").is_file():
            reports.append(outdir / "report.pdf")
    if len(reports) > 1:
        out.write("demo reports:\n" + "".join(f"  {p}\n" for p in reports))
    return worst_exit_code(codes)


def worst_exit_code(codes) -> int:
    """The most serious of several batch exit codes: none fitted (2) over some failed (1)
    over fitted but to check (3) over all good (0)."""
    rank = {EXIT_OK: 0, EXIT_CHECK: 1, EXIT_SOME_FAILED: 2, EXIT_ERROR: 3}
    return max(codes, key=lambda c: rank.get(c, 4)) if codes else EXIT_OK


def _gui(argv_rest, err) -> int:
    if sys.platform.startswith("linux") and not (os.environ.get("DISPLAY") or
                                                 os.environ.get("WAYLAND_DISPLAY") or
                                                 os.environ.get("QT_QPA_PLATFORM")):
        raise PellucidError("no display found for the desktop app (DISPLAY is not set). "
                            "Run it in a desktop session, or use the command-line tools: "
                            "pellucid --help")
    try:
        # app.main may import Qt only when it starts, so both steps are guarded.
        app_main = importlib.import_module("app.main")
        return int(app_main.main(argv_rest) or 0)
    except ImportError as e:
        missing = getattr(e, "name", "") or ""
        if missing.startswith(("PySide6", "shiboken6")):
            raise PellucidError("the desktop app needs PySide6, which is not installed: "
                                "pip install PySide6-Essentials") from None
        if missing in ("app", "app.main"):
            raise PellucidError("the desktop app is not part of this installation "
                                "(no module app.main)") from None
        # Typically a system library Qt needs (libEGL, libxkbcommon ...).
        raise PellucidError(f"the desktop app cannot start: {e}. On Linux, Qt needs the "
                            f"system libraries listed in DEVELOPERS.md") from None


# ---------------------------------------------------------------------------------
def main(argv=None, *, stdout=None, stderr=None) -> int:
    """Entry point of the ``pellucid`` command; returns the exit status."""
    out, err = stdout or sys.stdout, stderr or sys.stderr
    argv = list(sys.argv[1:] if argv is None else argv)
    parser = build_parser()
    if argv[:1] == ["gui"]:
        # Everything after "gui" belongs to the app's own options (--theme, --help ...).
        try:
            return _gui(argv[1:], err)
        except SystemExit as e:
            return int(e.code or 0)
        except PellucidError as e:
            err.write(f"pellucid: error: {e}\n")
            return EXIT_ERROR
    try:
        args = parser.parse_args(argv)
    except SystemExit as e:               # --help, --version, usage errors
        return int(e.code or 0)
    try:
        if args.command in (None, "gui"):
            rest = [args.project] if getattr(args, "project", None) else []
            return _gui(rest, err)
        if args.command == "simulate":
            return _simulate(args, out)
        if args.command == "fit":
            return _fit(args, out)
        if args.command == "batch":
            return _batch(args, out, err)
        if args.command == "demo":
            return _demo(args, out, err)
    except KeyboardInterrupt:
        err.write("pellucid: interrupted\n")
        return EXIT_INTERRUPTED
    except PellucidError as e:
        err.write(f"pellucid: error: {e}\n")
        return EXIT_ERROR
    except OSError as e:                  # disk full, permission denied ...
        where = f"{e.filename}: " if getattr(e, "filename", None) else ""
        err.write(f"pellucid: error: {where}{e.strerror or e}\n")
        return EXIT_ERROR
    parser.error(f"unknown command {args.command!r}")
    return EXIT_ERROR


def run() -> None:
    """The ``pellucid`` command: :func:`main`, then a quick exit.

    With scipy and matplotlib loaded, the interpreter's teardown (freeing every
    module's objects) takes 0.5-1 s after the work is done, and a command has
    written and closed its files by then. So the output streams are flushed, the
    atexit handlers run (worker pools, threads, temporary folders), and the
    process ends without the teardown. The desktop app (no command, or ``gui``)
    exits the usual way.
    """
    gui = not sys.argv[1:] or sys.argv[1] == "gui"
    code = int(main() or 0)
    if gui:
        sys.exit(code)
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):       # a closed pipe: nothing more to say
            pass
    atexit._run_exitfuncs()
    os._exit(code)


if __name__ == "__main__":
    run()
