"""The batch runner: one recipe applied to many spectra, unattended and restartable.

:func:`iter_batch` is a generator that yields one :class:`BatchStep` as each
spectrum finishes, so the CLI draws a progress bar and the GUI's worker emits a
signal from the same loop; :func:`run_batch` drives it to the end and returns a
:class:`BatchSummary`.

What the runner guarantees:

* **Independence.** Each spectrum is read, fitted and exported on its own
  (:func:`process_spectrum`). A file that cannot be read or a fit that fails is
  recorded with its reason (status ``"error"`` or ``"failed"``) and the batch
  goes on.
* **Nothing finished is lost.** Every spectrum's files are written atomically
  into ``<out>/spectra/<stem>-<sha256[:10]>/`` as soon as it is done, and the
  per-spectrum ``result.json`` (the resume marker, with its summary row) is
  written *last*. ``summary.csv`` and ``summary.json`` are rewritten atomically
  after each spectrum (past 200 rows at most once a second, so huge batches do
  not spend their time rewriting tables; the markers hold every row anyway).
  A killed run (Ctrl-C, SIGKILL, power cut) keeps every finished spectrum; ``resume=True`` skips those whose marker carries the same
  recipe hash, input SHA-256 and Pellucid version, so the rerun's summary
  equals an uninterrupted run's.
* **One batch per folder.** A lock file (``.pellucid-batch.lock``) refuses a
  second batch writing into the same output folder; a lock left by a killed
  run on this machine is taken over.
* **Provenance.** Software version, recipe hash, input SHA-256 and the time
  (UTC) are in every row, every marker and every export.
* **Flat memory.** Only the small summary rows are kept, never fit results.

Stopping (``stop`` event, the GUI's Stop button): no new spectrum starts; the
ones already running in worker processes finish and are recorded. Ctrl-C in
the CLI ends at once; spectra that finished are kept.

Parallelism: ``jobs`` worker processes (``concurrent.futures`` with the
``forkserver`` start method where available, else ``spawn``: both safe with
threads; a worker that crashes is replaced and its spectra are run again, once;
default: all cores); ``jobs=1`` runs in this process and honours ``stop`` inside a fit.
``scheduler="tcp://host:port"`` sends the same :func:`process_spectrum` calls to
an existing Dask distributed cluster instead; its workers must see the input
and output folders at the same paths.

Summary row columns (see :func:`summary_columns`): ``index, file, sha256,
status, reason``; per film layer ``L``: ``L_thickness`` and ``L_thickness_sigma``
(nm), ``L_n@550 L_k@550 L_n@633 L_k@633 L_n@1000 L_k@1000``; ``band_gap``,
``band_gap_sigma`` (eV), ``redchi``, ``chisqr``, ``nfev``, ``warnings``; a value
column for each limit on another quantity; ``spec_<key>`` (pass / fail / n/a)
per limit and ``spec_pass`` (all limits); then ``result_dir`` (the spectrum's
folder, relative to the output folder), ``recipe_hash``,
``software_version``, ``finished_utc`` and ``elapsed_s``. Statuses: ``ok``
(converged), ``failed`` (the fit ran but did not converge), ``error`` (the file
could not be read or the fit could not start).
"""

from __future__ import annotations

import csv
import glob
import inspect
import io
import json
import math
import multiprocessing
import os
import re
import socket
import time
import traceback
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterable, Iterator, Mapping

from . import __version__
from .atomic import atomic_write_json, atomic_write_text
from .errors import PellucidError
from .recipe import STANDARD_WAVELENGTHS_NM, Recipe, recipe_from_dict, recipe_hash
from .spectrum import sha256_of_file

__all__ = ["iter_batch", "run_batch", "process_spectrum", "expand_inputs", "summary_columns",
           "summary_row", "BatchStep", "BatchSummary", "BatchInputError", "SPECTRUM_SUFFIXES",
           "MARKER_NAME"]

#: File endings picked up when a folder is given as input (case-insensitive).
SPECTRUM_SUFFIXES = (".csv", ".txt", ".dat", ".tsv", ".asc", ".prn", ".sp")
#: Name of the per-spectrum record written last: its presence means "done".
MARKER_NAME = "result.json"
STATUSES = ("ok", "failed", "error")
#: How long to try reaching a Dask scheduler before giving up.
DASK_CONNECT_TIMEOUT_S = 20
_SAFE = re.compile(r"[^A-Za-z0-9._-]+")


class BatchInputError(PellucidError, ValueError):
    """An input path or pattern matches no file, or the output folder is unusable."""


@dataclass(frozen=True)
class BatchStep:
    """One finished spectrum, as yielded by :func:`iter_batch`.

    Attributes
    ----------
    index, total : int
        Position of the spectrum in the input list (0-based) and its length.
    path : Path
    status : {"ok", "failed", "error"}
    reason : str
        Why it failed ("" when ok).
    row : dict
        Its summary row.
    done : int
        Spectra finished so far, this one included (resumed ones count).
    skipped : bool
        True if taken from an earlier run (``resume``).
    """

    index: int
    total: int
    path: Path
    status: str
    reason: str
    row: dict
    done: int = 0
    skipped: bool = False


@dataclass(frozen=True)
class BatchSummary:
    """What a batch produced: counts, where the files are, and the exit status."""

    total: int
    counts: dict
    out_dir: Path
    summary_csv: Path
    summary_json: Path
    recipe_hash: str
    elapsed_s: float
    stopped: bool = False
    report_pdf: Path | None = None
    report_error: str = ""

    @property
    def succeeded(self) -> int:
        return self.counts.get("ok", 0)

    @property
    def exit_code(self) -> int:
        """0 all succeeded, 1 some failed, 2 none succeeded (or nothing to do)."""
        if self.total and self.succeeded == self.total and not self.stopped:
            return 0
        return 1 if self.succeeded else 2


# ---------------------------------------------------------------------------------
# Inputs
def expand_inputs(inputs: Iterable, *, exclude: Path | None = None) -> list[Path]:
    """Files, folders (their spectrum files, not recursive) and glob patterns -> paths.

    The order is the order of the inputs, each folder or pattern sorted by name;
    a file given twice is kept once. Anything under ``exclude`` (the output
    folder) is left out.

    Raises
    ------
    BatchInputError
        If an input is neither an existing file, a folder nor a pattern that
        matches something.
    """
    out: list[Path] = []
    seen: set[Path] = set()
    ex = Path(exclude).resolve() if exclude is not None else None

    def add(p: Path):
        r = p.resolve()
        if r in seen or (ex is not None and r.is_relative_to(ex)):
            return
        seen.add(r)
        out.append(p)

    for item in inputs:
        p = Path(item)
        if p.is_dir():
            found = sorted(q for q in p.iterdir() if q.is_file() and not q.name.startswith(".")
                           and q.suffix.lower() in SPECTRUM_SUFFIXES)
            if not found:
                raise BatchInputError(f"{p}: folder holds no spectrum files "
                                      f"({', '.join(SPECTRUM_SUFFIXES)})")
            for q in found:
                add(q)
        elif p.is_file():
            add(p)
        elif glob.has_magic(str(item)):
            found = sorted(Path(q) for q in glob.glob(str(item)) if Path(q).is_file())
            if not found:
                raise BatchInputError(f"{item}: the pattern matches no file")
            for q in found:
                add(q)
        else:
            raise BatchInputError(f"{item}: no such file or folder")
    return out


# ---------------------------------------------------------------------------------
# Rows
def summary_columns(recipe: Recipe) -> list[str]:
    """Column names of the summary table for this recipe, in order."""
    cols = ["index", "file", "sha256", "status", "reason"]
    for layer in recipe.stack.layers:
        L = layer.name
        cols += [f"{L}_thickness", f"{L}_thickness_sigma"]
        for wl in STANDARD_WAVELENGTHS_NM:
            cols += [f"{L}_n@{wl}", f"{L}_k@{wl}"]
    cols += ["band_gap", "band_gap_sigma", "redchi", "chisqr", "nfev", "warnings"]
    cols += [k for k in recipe.limits if k not in cols]
    if recipe.limits:
        cols += [f"spec_{k}" for k in recipe.limits] + ["spec_pass"]
    cols += ["result_dir", "recipe_hash", "software_version", "finished_utc", "elapsed_s"]
    return cols


def _num(x):
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _quantity(result, key: str):
    m = re.match(r"^(?P<layer>.+)_(?P<q>[nk])@(?P<wl>[\d.]+)$", key)
    if m:
        oc = result.optical.get(m.group("layer"))
        if oc is None:
            return None
        n, k = oc.at(float(m.group("wl")))
        return _num(n if m.group("q") == "n" else k)
    if key == "band_gap":
        return None if result.band_gap is None else _num(result.band_gap.Eg_eV)
    if key == "redchi":
        return _num(result.redchi)
    p = result.params.get(key)
    return None if p is None else _num(p.value)


def summary_row(result, recipe: Recipe, *, index: int, path, sha256: str, rhash: str,
                status: str, reason: str = "", output: str = "",
                elapsed_s: float | None = None) -> dict:
    """The summary row of one spectrum (``result`` may be None for an unreadable file)."""
    row = dict.fromkeys(summary_columns(recipe))
    row.update(index=index, file=str(path), sha256=sha256, status=status, reason=reason,
               result_dir=output, recipe_hash=rhash, software_version=__version__,
               finished_utc=datetime.now(timezone.utc).isoformat(timespec="seconds"),
               elapsed_s=None if elapsed_s is None else round(elapsed_s, 3))
    if result is not None:
        for layer in recipe.stack.layers:
            L = layer.name
            p = result.params.get(f"{L}_thickness")
            if p is not None:
                row[f"{L}_thickness"], row[f"{L}_thickness_sigma"] = _num(p.value), _num(p.stderr)
            for wl in STANDARD_WAVELENGTHS_NM:
                row[f"{L}_n@{wl}"] = _quantity(result, f"{L}_n@{wl}")
                row[f"{L}_k@{wl}"] = _quantity(result, f"{L}_k@{wl}")
        if result.band_gap is not None:
            row["band_gap"] = _num(result.band_gap.Eg_eV)
            row["band_gap_sigma"] = _num(result.band_gap.sigma_eV)
        row.update(redchi=_num(result.redchi), chisqr=_num(result.chisqr), nfev=result.nfev,
                   warnings="; ".join(result.warnings))
        for key in recipe.limits:
            if row.get(key) is None:
                row[key] = _quantity(result, key)
    if recipe.limits:
        verdicts = []
        for key, lim in recipe.limits.items():
            v = lim.check(row.get(key)) if status == "ok" else "n/a"
            row[f"spec_{key}"] = v
            verdicts.append(v)
        row["spec_pass"] = ("fail" if "fail" in verdicts else
                       "n/a" if "n/a" in verdicts else "pass")
    return row


# ---------------------------------------------------------------------------------
# One spectrum (runs in a worker process, a Dask worker or in-process)
# Optional parts are looked up by name, the same way recipes resolve their sections.
from .recipe import _optional  # noqa: E402


_RECIPES: dict[str, Recipe] = {}


def _recipe_for(task: Mapping) -> Recipe:
    # One rebuild per worker process, not per spectrum.
    r = _RECIPES.get(task["recipe_hash"])
    if r is None:
        r = _RECIPES[task["recipe_hash"]] = recipe_from_dict(task["recipe"])
    return r


def spectrum_folder(out_dir, path, sha256: str) -> Path:
    """``<out>/spectra/<stem>-<sha256[:10]>``: stable across runs, unique per content."""
    stem = _SAFE.sub("_", Path(path).stem).strip("._") or "spectrum"
    return Path(out_dir) / "spectra" / f"{stem}-{sha256[:10] or 'unreadable'}"


def _export_kind(name: str, stem: str) -> str:
    rest = name[len(stem):]
    if rest.startswith("_nk_"):
        return "nk"
    return {"_curves.csv": "curves", "_result.json": "json",
            "_report.txt": "report"}.get(rest, "plots")


def _export(result, folder: Path, stem: str, provenance: dict, recipe: Recipe) -> list[str]:
    """Per-spectrum exports through fitting.export when it is installed."""
    export_result = _optional("export", "export_result")
    if export_result is None or not recipe.exports:
        return []
    plots = recipe.plot_formats if "plots" in recipe.exports else ()
    files = export_result(result, folder, stem=stem, provenance=provenance, plots=plots)
    kept = []
    for f in map(Path, files):
        if _export_kind(f.name, stem) in recipe.exports:
            kept.append(f.name)
        else:
            f.unlink(missing_ok=True)
    return kept


def _provenance(rhash: str, recipe: Recipe, path, sha256: str) -> dict:
    return {"software": f"pellucid {__version__}", "recipe_hash": rhash,
            "input_file": str(path), "input_sha256": sha256,
            "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "recipe_name": recipe.name}


def process_spectrum(task: Mapping, *, stop=None) -> dict:
    """Read, fit and export one spectrum; write its marker last; return its summary row.

    Parameters
    ----------
    task : dict
        ``index``, ``path``, ``out_dir``, ``recipe`` (the recipe as a dict) and
        ``recipe_hash``. Plain data, so it pickles to any worker.
    stop : threading.Event, optional
        In-process runs only: stops the fit; a stopped spectrum writes no marker
        and its row has status ``"stopped"``.

    Returns
    -------
    dict
        The summary row. Never raises for a bad file or a failed fit.
    """
    t0 = time.perf_counter()
    recipe = _recipe_for(task)
    rhash, index, path = task["recipe_hash"], task["index"], Path(task["path"])

    def row(result, status, reason, sha="", output=""):
        return summary_row(result, recipe, index=index, path=path, sha256=sha, rhash=rhash,
                           status=status, reason=reason, output=output,
                           elapsed_s=time.perf_counter() - t0)

    try:
        sha = sha256_of_file(path)
    except OSError as e:
        return row(None, "error", f"cannot read the file: {e.strerror or e}")
    folder = spectrum_folder(task["out_dir"], path, sha)
    output = folder.relative_to(task["out_dir"]).as_posix()
    result, files, tb = None, [], ""
    try:
        read_spectrum = _optional("reader", "read_spectrum")
        fit_spectrum = _optional("fit", "fit_spectrum")
        if read_spectrum is None or fit_spectrum is None:
            raise PellucidError("this installation has no spectrum reader or fit engine "
                                "(fitting.reader / fitting.fit missing)")
        spectrum = read_spectrum(path, options=recipe.reader_options())
        result = fit_spectrum(spectrum, recipe.new_stack(), recipe.make_fit_options(spectrum),
                              stop=stop)
        if result.aborted and stop is not None and stop.is_set():
            return row(result, "stopped", "stopped by the user", sha, output)
        status, reason = ("ok", "") if result.success else ("failed", result.message or
                                                            "the fit did not converge")
        folder.mkdir(parents=True, exist_ok=True)
        files = _export(result, folder, path.stem, _provenance(rhash, recipe, path, sha),
                        recipe)
    except PellucidError as e:
        status, reason = "error", str(e)
    except MemoryError:
        status, reason = "error", "out of memory while fitting this spectrum"
    except Exception as e:          # a bug must not stop the batch; record it in full
        status = "error"
        reason = f"internal error ({type(e).__name__}: {e}); please report it"
        tb = traceback.format_exc()
    r = row(result, status, " ".join(reason.split()), sha, output)
    record = {"format": "pellucid-batch-record", "version": 1,
              "software": {"name": "pellucid", "version": __version__},
              "recipe_hash": rhash, "input": {"path": str(path), "sha256": sha},
              "finished_utc": r["finished_utc"], "row": r, "files": files}
    if result is not None:
        record["result"] = _json_safe(result.to_dict(curves=False))
    if status == "error" and tb:
        record["traceback"] = tb
    try:
        folder.mkdir(parents=True, exist_ok=True)
        _remove_old_exports(folder, keep=set(files))
        atomic_write_json(folder / MARKER_NAME, record)    # last: marks the spectrum done
    except (OSError, ValueError, TypeError) as e:
        r["status"], r["reason"] = "error", f"cannot write results: {e}"
    return r


def _remove_old_exports(folder: Path, keep: set) -> None:
    """Delete files an earlier run (another recipe) exported here and this one did not.

    Without this, a figure from last week's recipe could sit beside today's
    tables. Only files the old marker lists are touched.
    """
    try:
        old = json.loads((folder / MARKER_NAME).read_text(encoding="utf-8")).get("files", [])
    except (OSError, ValueError, AttributeError):
        return
    for name in old if isinstance(old, list) else []:
        if isinstance(name, str) and name not in keep and name == Path(name).name \
                and name != MARKER_NAME:
            (folder / name).unlink(missing_ok=True)


def _json_safe(obj):
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, Mapping):
        return {str(k): _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_safe(v) for v in obj]
    if isinstance(obj, (str, int, bool)) or obj is None:
        return obj
    try:
        return _json_safe(float(obj))
    except (TypeError, ValueError):
        return str(obj)


def read_marker(out_dir, path, sha256: str, rhash: str) -> dict | None:
    """The summary row of an earlier run of this spectrum with this recipe, else None.

    Reused only if the marker names the same recipe hash, input SHA-256 and
    Pellucid version, and the spectrum did not end in an internal error.
    """
    f = spectrum_folder(out_dir, path, sha256) / MARKER_NAME
    try:
        rec = json.loads(f.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(rec, dict) or rec.get("recipe_hash") != rhash:
        return None
    if (rec.get("software") or {}).get("version") != __version__:
        return None                 # another Pellucid version may fit differently
    row = rec.get("row")
    if not isinstance(row, dict) or (rec.get("input") or {}).get("sha256") != sha256:
        return None
    if str(row.get("reason", "")).startswith("internal error"):
        return None                 # a bug, not the file: worth another try
    return row


# ---------------------------------------------------------------------------------
# Summary files
def _cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        return repr(v)
    return str(v)


def write_summary(rows: Iterable[Mapping], columns: list[str], out_dir: Path, header: dict):
    """Rewrite summary.csv and summary.json atomically (rows in input order)."""
    rows = sorted(rows, key=lambda r: r["index"])
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(columns)
    for r in rows:
        w.writerow([_cell(r.get(c)) for c in columns])
    atomic_write_text(out_dir / "summary.csv", buf.getvalue())
    counts = {s: sum(1 for r in rows if r["status"] == s) for s in STATUSES}
    doc = {"format": "pellucid-batch-summary", "version": 1, **header,
           "updated_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
           "counts": counts, "columns": columns, "rows": [_json_safe(r) for r in rows]}
    atomic_write_json(out_dir / "summary.json", doc)


def _write_report(rows, out_dir: Path, recipe: Recipe) -> tuple[Path | None, str]:
    """The batch PDF through fitting.report when it is installed: (path, error text)."""
    write_batch_report = _optional("report", "write_batch_report")
    if write_batch_report is None:
        return None, ""
    pdf = out_dir / "report.pdf"
    accepted = inspect.signature(write_batch_report).parameters
    extra = {k: v for k, v in (("recipe", recipe), ("spec", recipe.limits or None))
             if k in accepted}
    try:
        write_batch_report(sorted(rows, key=lambda r: r["index"]), out_dir, pdf, **extra)
    except Exception as e:          # the report is a courtesy; the results stand without it
        return None, f"the PDF report could not be written: {type(e).__name__}: {e}"
    return pdf, ""


# ---------------------------------------------------------------------------------
def iter_batch(paths, recipe: Recipe, out_dir, *, jobs: int | None = None,
               resume: bool = False, stop=None, scheduler: str | None = None,
               report: bool = True) -> Iterator[BatchStep]:
    """Fit every spectrum with one recipe, yielding a :class:`BatchStep` as each finishes.

    Parameters
    ----------
    paths : iterable of path-like
        Spectrum files, folders or glob patterns (see :func:`expand_inputs`).
    recipe : Recipe
    out_dir : path-like
        Created if missing; holds ``summary.csv``, ``summary.json``,
        ``report.pdf`` and ``spectra/<stem>-<hash>/``.
    jobs : int, optional
        Worker processes; default all cores; 1 runs in this process.
    resume : bool
        Skip spectra already done with the same recipe hash and input SHA-256.
    stop : threading.Event, optional
        Checked between spectra (and inside fits when ``jobs=1``); when set, no
        new spectrum is started and the generator ends after writing the summary.
    scheduler : str, optional
        Address of a Dask distributed scheduler to run on instead of local
        processes (``jobs`` is then ignored). The workers need the same Pellucid
        version and must see ``paths`` and ``out_dir`` at the same locations.
    report : bool
        Write ``report.pdf`` at the end (when :mod:`fitting.report` is installed).

    Yields
    ------
    BatchStep
        In completion order (not input order).

    Returns
    -------
    BatchSummary
        As the generator's return value (``StopIteration.value``); see :func:`run_batch`.

    Raises
    ------
    BatchInputError
        Before any work: an input matches no file, ``out_dir`` is not a folder,
        ``jobs`` is invalid, another batch is writing into ``out_dir``, or the
        Dask scheduler cannot be reached.

    Examples
    --------
    >>> for step in iter_batch(["runs/"], load_recipe("r.json"), "out"):  # doctest: +SKIP
    ...     print(step.done, step.total, step.path.name, step.status)
    """
    t0 = time.perf_counter()
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise BatchInputError(f"{out_dir}: output path exists and is not a folder")
    paths = expand_inputs(paths, exclude=out_dir)
    if jobs is not None and (isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1):
        raise BatchInputError(f"jobs = {jobs!r}: must be a whole number of at least 1")
    out_dir.mkdir(parents=True, exist_ok=True)
    lock = _acquire_lock(out_dir)
    try:
        return (yield from _batch(paths, recipe, out_dir, jobs, resume, stop, scheduler,
                                  report, t0))
    finally:
        lock.unlink(missing_ok=True)


LOCK_NAME = ".pellucid-batch.lock"


def _acquire_lock(out_dir: Path) -> Path:
    """Refuse a second batch writing into the same folder; take over a dead one's lock."""
    lock = out_dir / LOCK_NAME
    me = {"pid": os.getpid(), "host": socket.gethostname(),
          "started_utc": datetime.now(timezone.utc).isoformat(timespec="seconds")}
    for _ in range(2):
        try:
            fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            try:
                other = json.loads(lock.read_text(encoding="utf-8"))
            except (OSError, ValueError):
                other = {}
            pid, host = other.get("pid"), other.get("host")
            if host == me["host"] and isinstance(pid, int) and not _alive(pid):
                lock.unlink(missing_ok=True)         # left by a killed run: take over
                continue
            raise BatchInputError(
                f"{out_dir}: another batch (process {pid} on {host}, started "
                f"{other.get('started_utc')}) is writing to this folder; wait for it to end "
                f"or choose another output folder. If no batch is running, delete "
                f"{lock}") from None
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(me, fh)
        return lock
    raise BatchInputError(f"{out_dir}: cannot take the batch lock {lock}")


def _alive(pid: int) -> bool:
    if pid == os.getpid() or os.name == "nt":
        return True              # (on Windows os.kill would end the process; be safe)
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError):
        return True              # exists (another user's) or cannot tell: assume running
    return True


def _batch(paths, recipe, out_dir, jobs, resume, stop, scheduler, report, t0):
    rdict, rhash = recipe.to_dict(), recipe_hash(recipe)
    columns = summary_columns(recipe)
    header = {"software": {"name": "pellucid", "version": __version__}, "recipe_hash": rhash,
              "recipe_name": recipe.name,
              "started_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
              "total": len(paths)}
    atomic_write_json(out_dir / "recipe.json", rdict)   # the exact recipe, for provenance
    total = len(paths)
    rows: dict[int, dict] = {}
    last_write = [0.0]

    def record(i: int, r: dict, skipped: bool) -> BatchStep:
        rows[i] = r
        now = time.monotonic()
        # Rewrite after every spectrum; for very large batches at most once a second
        # (the per-spectrum markers hold everything, --resume rebuilds the table).
        if len(rows) <= 200 or now - last_write[0] >= 1.0 or len(rows) == total:
            write_summary(rows.values(), columns, out_dir, header)
            last_write[0] = now
        return BatchStep(i, total, paths[i], r["status"], r.get("reason") or "", r,
                         len(rows), skipped)

    if resume:
        _remove_stale_temps(out_dir)
    todo = []
    for i, p in enumerate(paths):
        if resume:
            try:
                sha = sha256_of_file(p)
            except OSError:
                sha = ""
            old = read_marker(out_dir, p, sha, rhash) if sha else None
            if old is not None:
                old = dict(old, index=i, file=str(p))
                yield record(i, old, True)
                continue
        todo.append({"index": i, "path": str(p), "out_dir": str(out_dir), "recipe": rdict,
                     "recipe_hash": rhash})

    stopped = False
    active: dict[int, dict] = {}     # tasks started and not yet recorded
    try:
        if not todo:
            pass
        elif scheduler:
            run = _run_dask(todo, scheduler, stop, active)
        elif (jobs or os.cpu_count() or 1) == 1 or len(todo) == 1:
            run = _run_inline(todo, stop, active)
        else:
            run = _run_pool(todo, jobs or os.cpu_count() or 1, stop, active)
        for task, r in (run if todo else ()):
            if r.get("status") == "stopped":
                active.pop(task["index"], None)
                stopped = True
                continue
            step = record(task["index"], r, False)
            active.pop(task["index"], None)
            yield step
        stopped = stopped or bool(stop is not None and stop.is_set() and len(rows) < total)
    finally:
        # An interrupt can land after a spectrum's marker was written but before its
        # row reached us; take such rows from their markers so the summary is complete.
        for i, task in list(active.items()):
            if i not in rows:
                try:
                    old = read_marker(out_dir, task["path"], sha256_of_file(task["path"]),
                                      rhash)
                except OSError:
                    old = None
                if old is not None:
                    rows[i] = dict(old, index=i, file=task["path"])
        if rows:
            write_summary(rows.values(), columns, out_dir, header)
    pdf, report_error = (None, "")
    if report and rows:
        pdf, report_error = _write_report(list(rows.values()), out_dir, recipe)
    counts = {s: sum(1 for r in rows.values() if r["status"] == s) for s in STATUSES}
    return BatchSummary(total, counts, out_dir, out_dir / "summary.csv",
                        out_dir / "summary.json", rhash, time.perf_counter() - t0, stopped,
                        pdf, report_error)


def _remove_stale_temps(out_dir: Path) -> None:
    # Temporary files of atomic writes interrupted by a kill; never a finished file.
    for pattern in (".*.tmp", "spectra/*/.*.tmp"):
        for f in out_dir.glob(pattern):
            f.unlink(missing_ok=True)


def _stopped(stop) -> bool:
    return stop is not None and stop.is_set()


def _run_inline(todo, stop, active):
    for task in todo:
        if _stopped(stop):
            return
        active[task["index"]] = task
        yield task, process_spectrum(task, stop=stop)


def _crash_row(task, why: str) -> dict:
    recipe = _recipe_for(task)
    return summary_row(None, recipe, index=task["index"], path=task["path"], sha256="",
                       rhash=task["recipe_hash"], status="error", reason=why)


#: Imported once by the fork server, so each worker starts with the fit engine loaded.
_PRELOAD = ["fitting.batch", "fitting.fit", "fitting.reader", "fitting.export"]


def _mp_context():
    """'forkserver' where the OS has it (POSIX), else 'spawn'.

    Both start workers from a clean process (never fork() a process that may run
    GUI or BLAS threads). The fork server imports the fit engine once and forks
    warm workers from it, which also makes restarting after a worker crash quick.
    """
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(_PRELOAD)
        return ctx
    return multiprocessing.get_context("spawn")


_CRASH_REASON = ("a worker process crashed twice while this spectrum was being fitted "
                 "(out of memory?); it was skipped")


def _run_pool(todo, jobs: int, stop, active):
    """Local worker processes, at most 2 x jobs tasks in flight (flat memory)."""
    ctx = _mp_context()
    queue = list(reversed(todo))
    crashes: dict[int, int] = {}
    pool = ProcessPoolExecutor(max_workers=jobs, mp_context=ctx)
    inflight: dict = {}
    try:
        while queue or inflight:
            broken = False
            while queue and len(inflight) < 2 * jobs and not _stopped(stop):
                task = queue.pop()
                try:
                    inflight[pool.submit(process_spectrum, task)] = task
                except BrokenProcessPool:
                    queue.append(task)
                    broken = True
                    break
                active[task["index"]] = task
            if _stopped(stop):
                # Not yet started: drop. Running: let them finish, so nothing done is lost.
                for fut in [f for f in inflight if f.cancel()]:
                    active.pop(inflight.pop(fut)["index"], None)
                queue.clear()
            done = set()
            if inflight and not broken:
                done, _ = wait(inflight, timeout=0.5, return_when=FIRST_COMPLETED)
            for fut in done:
                task = inflight.pop(fut)
                try:
                    r = fut.result()
                except BrokenProcessPool:
                    broken = True
                    n = crashes[task["index"]] = crashes.get(task["index"], 0) + 1
                    if n < 2:
                        queue.append(task)
                        continue
                    r = _crash_row(task, _CRASH_REASON)
                except Exception as e:
                    r = _crash_row(task, f"worker error: {type(e).__name__}: {e}")
                yield task, r
            if broken:
                # A worker died and took the pool with it: run what was in flight again
                # in a new pool (each spectrum gets one second chance, see above).
                for fut, task in list(inflight.items()):
                    if fut.done() and not fut.cancelled() and fut.exception() is None:
                        yield task, fut.result()          # finished just before the crash
                        continue
                    n = crashes[task["index"]] = crashes.get(task["index"], 0) + 1
                    if n < 2:
                        queue.append(task)
                    else:
                        yield task, _crash_row(task, _CRASH_REASON)
                inflight.clear()
                pool.shutdown(wait=False, cancel_futures=True)
                pool = ProcessPoolExecutor(max_workers=jobs, mp_context=ctx)
            if _stopped(stop) and not inflight:
                return
    finally:
        pool.shutdown(wait=False, cancel_futures=True)


def _run_dask(todo, address: str, stop, active):
    """The same per-spectrum calls on an existing Dask distributed cluster."""
    try:
        from dask.distributed import Client, as_completed
    except ImportError:
        raise BatchInputError("--scheduler needs Dask distributed: "
                              "pip install 'dask[distributed]'") from None
    try:
        client = Client(address, timeout=DASK_CONNECT_TIMEOUT_S, set_as_default=False)
    except (OSError, TimeoutError) as e:
        raise BatchInputError(f"cannot reach the Dask scheduler at {address}: {e}") from None
    try:
        nworkers = max(1, len(client.scheduler_info().get("workers", {})))
        queue = list(reversed(todo))
        inflight: dict = {}

        def submit():
            task = queue.pop()
            fut = client.submit(process_spectrum, task, pure=False)
            inflight[fut.key] = (fut, task)
            active[task["index"]] = task
            return fut

        # A bounded window keeps the scheduler's memory flat for long batches.
        first = [submit() for _ in range(min(len(queue), 4 * nworkers))]
        ac = as_completed(first, loop=client.loop)
        for fut in ac:
            _, task = inflight.pop(fut.key)
            try:
                r = fut.result()
            except Exception as e:
                r = _crash_row(task, f"Dask worker error: {type(e).__name__}: {e}")
            fut.release()
            yield task, r
            if _stopped(stop):
                client.cancel([f for f, _ in inflight.values()])
                return
            if queue:
                ac.add(submit())
    finally:
        client.close()


def run_batch(paths, recipe: Recipe, out_dir, *, on_step=None, **kw) -> BatchSummary:
    """Run :func:`iter_batch` to the end; call ``on_step(step)`` for each step."""
    gen = iter_batch(paths, recipe, out_dir, **kw)
    while True:
        try:
            step = next(gen)
        except StopIteration as e:
            return e.value
        if on_step is not None:
            on_step(step)
