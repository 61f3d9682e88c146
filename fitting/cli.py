"""The ``pellucid`` command: simulate, fit one spectrum, run a batch, run the demo, open the app.

Run ``pellucid --help`` or ``pellucid <command> --help`` for the options. User
errors (bad files, invalid recipes) print one message on stderr and return a
non-zero exit status, never a traceback. This module, like all of ``fitting``,
never imports Qt: ``pellucid gui`` loads the desktop app by name at run time.
"""

from __future__ import annotations

import argparse
import importlib
import math
import os
import shutil
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

from . import __version__
from .errors import PellucidError

EXIT_OK, EXIT_SOME_FAILED, EXIT_ERROR, EXIT_INTERRUPTED = 0, 1, 2, 130

_BATCH_EPILOG = """\
exit status:
  0    every spectrum was fitted successfully
  1    some spectra failed (see the 'status' and 'reason' columns of summary.csv)
  2    no spectrum succeeded, or a usage error (bad option, recipe or input path)
  130  interrupted (Ctrl-C); finished spectra are kept, rerun with --resume

output folder:
  summary.csv, summary.json     one row per spectrum, rewritten after each one
  report.pdf                    the batch report (written at the end)
  recipe.json                   the exact recipe used
  spectra/<stem>-<hash>/        each spectrum's exports; result.json is written last
                                and marks the spectrum as done for --resume
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
    s.add_argument("--out", metavar="FILE", help="CSV file to write (default: standard output)")

    f = sub.add_parser("fit", help="fit one spectrum and write all exports",
                       description="Fit one spectrum with a recipe; write the exports into "
                                   "DIR and print the fit report. Exit status 0 converged, "
                                   "1 not converged, 2 error.")
    f.add_argument("spectrum", metavar="SPECTRUM", help="spectrum file")
    f.add_argument("--recipe", required=True, metavar="RECIPE", help="recipe file (.json)")
    f.add_argument("--out", required=True, metavar="DIR", help="folder for the exports")

    b = sub.add_parser("batch", help="fit many spectra with one recipe",
                       description="Fit every spectrum with one recipe, in parallel. A bad "
                                   "file is recorded with its reason and the batch goes on.",
                       epilog=_BATCH_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    b.add_argument("inputs", nargs="+", metavar="INPUTS",
                   help="spectrum files, folders or glob patterns (quote them: 'runs/*.csv')")
    b.add_argument("--recipe", required=True, metavar="RECIPE", help="recipe file (.json)")
    b.add_argument("--out", required=True, metavar="DIR", help="output folder")
    b.add_argument("--jobs", type=_positive_int, metavar="N",
                   help="worker processes (default: all cores; 1 = in this process)")
    b.add_argument("--resume", action="store_true",
                   help="skip spectra already done with the same recipe and input file")
    b.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on an existing Dask distributed cluster, e.g. tcp://10.0.0.5:8786 "
                        "(workers must see the input and output folders at the same paths)")
    b.add_argument("--no-report", action="store_true", help="do not write report.pdf")

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
             f"# created: {datetime.now(timezone.utc).isoformat(timespec='seconds')}",
             f"# angle_deg: {angle:g}", f"# polarization: {pol}",
             "# columns: wavelength in nm; T and R as fractions (1.0 = 100 %)",
             "wavelength_nm,T,R"]
    lines += [f"{w:.10g},{t:.10g},{r:.10g}" for w, t, r in zip(wl, T, R)]
    text = "\n".join(lines) + "\n"
    if args.out:
        from .atomic import atomic_write_text
        atomic_write_text(Path(args.out), text)
        print(f"wrote {len(wl)} wavelengths to {args.out}", file=sys.stderr)
    else:
        out.write(text)
    return EXIT_OK


def _fit(args, out) -> int:
    from . import batch
    from .recipe import load_recipe, recipe_hash
    from .spectrum import sha256_of_file
    recipe = load_recipe(args.recipe)
    read_spectrum = batch._optional("reader", "read_spectrum")
    fit_spectrum = batch._optional("fit", "fit_spectrum")
    if read_spectrum is None or fit_spectrum is None:
        raise PellucidError("this installation has no spectrum reader or fit engine")
    path = Path(args.spectrum)
    if path.is_dir():
        raise _UsageError(f"{path} is a folder; 'pellucid fit' takes one spectrum file, "
                          f"use 'pellucid batch {path} --recipe ... --out ...' for a folder")
    if not path.is_file():
        raise _UsageError(f"{path}: no such file; check the path")
    outdir = Path(args.out)
    if outdir.exists() and not outdir.is_dir():
        raise _UsageError(f"--out {outdir} is a file; give a folder for the exports")
    spectrum = read_spectrum(path, options=recipe.reader_options())
    result = fit_spectrum(spectrum, recipe.new_stack(), recipe.make_fit_options(spectrum))
    outdir.mkdir(parents=True, exist_ok=True)
    # Say what was fitted: a reflectance file fits as R under an "auto" reader setting.
    out.write(f"fitted {'transmittance T' if spectrum.quantity == 'T' else 'reflectance R'} "
              f"of {path.name} ({len(spectrum)} points)\n")
    prov = batch._provenance(recipe_hash(recipe), recipe, path, sha256_of_file(path))
    files = batch._export(result, outdir, path.stem, prov, recipe)
    out.write(result.report() + "\n")
    if files:
        out.write(f"\nwrote {len(files)} files to {outdir}\n")
    else:
        out.write(f"\nno exports written (none chosen in the recipe or no export module)\n")
    return EXIT_OK if result.success else EXIT_SOME_FAILED


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
            line = (f"\r[{'#' * fill}{'.' * (width - fill)}] {step.done}/{step.total}  "
                    f"{rate:.2f} spectra/s  ETA {eta}  failed {bad}  {name[:30]}")
            # Never wider than the terminal, or the bar wraps onto new lines.
            cols = max(40, shutil.get_terminal_size((100, 24)).columns - 1)
            self.stream.write(line.ljust(cols)[:cols])
            if step.done == step.total:
                self.stream.write("\n")
        else:
            what = step.reason if step.status != "ok" else _headline(step.row)
            # Reader messages start with the file name, already on the line.
            what = what.removeprefix(f"{step.path}, ").removeprefix(f"{step.path}: ")
            tag = " (resumed)" if step.skipped else ""
            self.stream.write(f"[{step.done}/{step.total}] {step.status:<6} {step.path}{tag}"
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
    for k, v in row.items():
        if k.endswith("_thickness") and isinstance(v, (int, float)):
            sig = row.get(f"{k}_sigma")
            pm = f" ± {sig:.2g}" if isinstance(sig, (int, float)) else ""
            return f"{k} = {v:.1f}{pm} nm"
    return ""


def _batch(args, out, err, *, inputs=None, recipe_path=None, outdir=None) -> int:
    from .batch import iter_batch
    from .recipe import load_recipe
    recipe = load_recipe(recipe_path or args.recipe)
    outdir = Path(outdir or args.out)
    gen = iter_batch(inputs or args.inputs, recipe, outdir, jobs=args.jobs,
                     resume=getattr(args, "resume", False),
                     scheduler=getattr(args, "scheduler", None),
                     report=not getattr(args, "no_report", False))
    progress, t0 = None, time.monotonic()
    try:
        while True:
            try:
                step = next(gen)
            except StopIteration as e:
                summary = e.value
                break
            if progress is None:
                progress = _Progress(err, step.total, t0)
            progress(step)
    except KeyboardInterrupt:
        gen.close()             # writes the summary of what is finished
        if progress is not None and progress.tty:
            err.write("\n")
        err.write(f"pellucid: interrupted; finished spectra are kept in {outdir}. "
                  f"Rerun with --resume to continue.\n")
        return EXIT_INTERRUPTED
    c = summary.counts
    out.write(f"{summary.total} spectra: {c.get('ok', 0)} ok, {c.get('failed', 0)} failed, "
              f"{c.get('error', 0)} errors ({summary.elapsed_s:.1f} s)\n")
    out.write(f"summary: {summary.summary_csv}\n")
    if summary.report_pdf is not None:
        out.write(f"report:  {summary.report_pdf}\n")
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
    return max(codes)


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


if __name__ == "__main__":
    sys.exit(main())
