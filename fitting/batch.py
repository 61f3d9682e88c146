"""The batch runner: recipes applied to many spectra, unattended and restartable.

:func:`iter_batch` is a generator that yields one :class:`BatchStep` as each
spectrum finishes, so the CLI draws a progress bar and the GUI's worker emits a
signal from the same loop; :func:`run_batch` drives it to the end and returns a
:class:`BatchSummary`.

What the runner guarantees:

* **Independence.** Each spectrum is read, fitted and exported on its own
  (:func:`process_spectrum`). A file that cannot be read or a fit that fails is
  recorded with its reason (status ``"error"`` or ``"failed"``) and the batch
  goes on. A spreadsheet (``.xlsx`` ...) in an input folder gets a row saying
  how to export it as text.
* **Per-spectrum results are the truth.** Every spectrum's files are written
  atomically into ``<out>/spectra/<stem>-<sha256[:10]>/`` as soon as it is
  done, and its marker ``result.json`` (with its summary row) is written
  *last*. ``summary.csv`` and ``summary.json`` are rebuilt from the markers when
  the batch ends (also after Ctrl-C, SIGTERM or the Stop button), retried, and a
  failure to write them is a warning, never a lost batch. A killed run keeps
  every finished spectrum; ``resume=True`` skips those whose marker carries the
  same recipe identity (:func:`fitting.recipe.recipe_identity`: start values,
  name and notes do not count), input SHA-256 and Pellucid version, and writes
  the summary an uninterrupted run would have written.
* **A full disk stops the batch**, with a message saying that finished spectra
  are kept and to rerun with ``--resume`` once there is space.
* **The user's files are safe.** The output folder must be new, empty or an
  earlier batch's, and every file it replaces one a batch wrote
  (:func:`fitting.batch_files.check_out_dir`); one batch per folder
  (an operating-system lock that never goes stale).
* **Provenance.** Software version, recipe hash (and identity), input SHA-256,
  the reference files' SHA-256 and the time (UTC) are in every row, every
  marker and every export.
* **Cost flat in the number of spectra.** Nothing is rewritten or rescanned per
  spectrum; the main process keeps a few bytes per spectrum, never fit results;
  the recipe goes to each worker process once, not with every task.

Stopping (``stop`` event, the GUI's Stop button): no new spectrum starts; the
ones already running in worker processes finish and are recorded. Ctrl-C and
SIGTERM in the CLI end at once: the workers are ended, finished spectra kept.
Worker processes also end by themselves when the main process dies in any way
(:mod:`fitting.pool`).

Parallelism: ``jobs`` worker processes (default: all cores); ``jobs=1`` runs in
this process and honours ``stop`` inside a fit. ``scheduler="tcp://host:port"``
sends the same :func:`process_spectrum` calls to an existing Dask distributed
cluster instead; its workers must see the input and output folders at the same
paths. **Only use a cluster you control**: Dask moves tasks and results
between machines with pickle, so whoever can talk to the scheduler can run
code on the workers and forge results. The recipe is sent to each worker once
(without its notes); a task carries only the spectrum's path, hash and folder.

Several recipes in one batch: an input may be a pair ``(path or pattern,
Recipe)``; :func:`read_manifest` reads such pairs from a CSV file with the
columns ``file,recipe``. The summary then has the columns of all recipes, the
recipes are saved under ``recipes/`` and each gets its own report.

Summary row columns (see :func:`summary_columns`): ``index, file, sha256,
status, verdict, reason, model`` (the film model of the result, a key of
:data:`fitting.presets.MODEL_CHOICES`; with ``fit.suggest_model`` the one the
suggestion chose, and ``model_reason`` says why); per film layer ``L``: ``L_thickness`` and
``L_thickness_sigma`` (nm), ``L_n@550 L_k@550 L_n@633 L_k@633 L_n@1000
L_k@1000``; ``band_gap``, ``band_gap_sigma`` (eV), ``redchi``, ``chisqr``,
``nfev``, ``warnings``, ``verdict_reasons``; a value column for each limit on
another quantity; ``spec_<key>`` (pass / fail / n/a) per limit and
``spec_pass`` (all limits); then ``result_dir`` (the spectrum's folder, relative
to the output folder), ``recipe_name``, ``recipe_hash``, ``software_version``,
``finished_utc`` and ``elapsed_s``. Statuses: ``ok`` (the fit converged),
``failed`` (the fit ran but did not converge), ``error`` (the file could not be
read or the fit could not start). Verdicts (fits with status ``ok``):
``good``, ``check`` or ``poor`` from the fit engine's own assessment, with
``verdict_reasons`` in plain words; empty where the engine gives none.
"""

from __future__ import annotations

import csv
import dataclasses
import glob
import hashlib
import importlib
import json
import os
import re
import threading
import time
import traceback
import uuid
from concurrent.futures import FIRST_COMPLETED, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from collections.abc import Iterable, Iterator, Mapping

from . import __version__
from .atomic import atomic_write_json, atomic_write_text, deferred_sync, flush_to_disk
from .batch_files import (MARKER_NAME, LOCK_NAME, FolderLock, OutputFolderError,  # noqa: F401
                          assign_folders, check_out_dir, export_stem, is_disk_full,
                          read_marker_record, safe_stem, write_stamp, write_summary_files)
from .errors import PellucidError, RecipeError
from .jsonsafe import finite_or_none, json_safe, json_text
from .limits import overall_state
from .pool import BATCH_PRELOAD, start_workers_early
from .recipe import (STANDARD_WAVELENGTHS_NM, Recipe, load_recipe, recipe_from_dict,
                     recipe_hash, recipe_identity)
from .spectrum import sha256_of_file

__all__ = ["iter_batch", "run_batch", "process_spectrum", "expand_inputs", "read_manifest",
           "summary_columns", "summary_row", "prepare", "BatchStep", "BatchSummary",
           "BatchInputError", "SPECTRUM_SUFFIXES", "SPREADSHEET_SUFFIXES", "MARKER_NAME",
           "STATUSES", "VERDICTS", "result_model"]

#: File endings picked up when a folder is given as input (case-insensitive).
SPECTRUM_SUFFIXES = (".csv", ".txt", ".dat", ".tsv", ".asc", ".prn", ".sp", ".jdx", ".dx")
#: Spreadsheet workbooks in an input folder: listed with a reason, never silently skipped.
SPREADSHEET_SUFFIXES = (".xlsx", ".xlsm", ".xls", ".ods")
STATUSES = ("ok", "failed", "error")
VERDICTS = ("good", "check", "poor")
#: How long to try reaching a Dask scheduler before giving up.
DASK_CONNECT_TIMEOUT_S = 20


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
        True if taken from an earlier run (``resume``): "skipped (done earlier)".
    """

    index: int
    total: int
    path: Path
    status: str
    reason: str
    row: dict
    done: int = 0
    skipped: bool = False

    @property
    def verdict(self) -> str:
        return str(self.row.get("verdict") or "")


@dataclass(frozen=True)
class BatchSummary:
    """What a batch produced: counts, where the files are, and the exit status.

    ``counts`` has the statuses (``ok``, ``failed``, ``error``) of the spectra in
    the summary; ``skipped`` how many of them were done by an earlier run;
    ``verdicts`` the verdicts of the ``ok`` ones; ``halted`` why the batch stopped
    by itself (a full disk), ``warnings`` what went wrong around the results
    (summary or report not written); ``ignored`` the files in the input folders
    that are not spectra (left out).
    """

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
    skipped: int = 0
    verdicts: dict = field(default_factory=dict)
    halted: str = ""
    warnings: tuple = ()
    report_pdfs: tuple = ()
    ignored: tuple = ()

    @property
    def succeeded(self) -> int:
        return self.counts.get("ok", 0)

    @property
    def exit_code(self) -> int:
        """0 all fitted and good; 3 all fitted, some to check; 1 some failed or not
        done; 2 none fitted (or nothing to do)."""
        if not self.total or not self.succeeded:
            return 2
        if self.succeeded < self.total or self.stopped or self.halted:
            return 1
        if self.verdicts.get("check", 0) or self.verdicts.get("poor", 0):
            return 3
        return 0


# ---------------------------------------------------------------------------------
# Inputs
def expand_inputs(inputs: Iterable, *, exclude: Path | None = None,
                  ignored: list | None = None, folders: list | None = None) -> list[Path]:
    """Files, folders (their spectrum files, not recursive) and glob patterns -> paths.

    The order is the order of the inputs, each folder or pattern sorted by name;
    a file given twice is kept once. Anything under ``exclude`` is left out. In
    a folder, spreadsheets (:data:`SPREADSHEET_SUFFIXES`) are kept (the batch gives
    them a row with a reason); other files are left out and, if ``ignored`` is a
    list, appended to it. ``folders`` (a list) receives the folders given.

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
            if folders is not None:
                folders.append(p)
            found, other = [], []
            for q in sorted(p.iterdir()):
                if not q.is_file() or q.name.startswith("."):
                    continue
                suffix = q.suffix.lower()
                (found if suffix in SPECTRUM_SUFFIXES + SPREADSHEET_SUFFIXES
                 else other).append(q)
            if not found:
                raise BatchInputError(f"{p}: folder holds no spectrum files "
                                      f"({', '.join(SPECTRUM_SUFFIXES)})")
            for q in found:
                add(q)
            if ignored is not None:
                ignored.extend(other)
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


def read_manifest(path) -> list[tuple[str, Recipe]]:
    """Read a batch manifest: a CSV file with the columns ``file`` and ``recipe``.

    Each row assigns a recipe file to a spectrum file, a folder or a glob pattern
    (``line3/*.csv``); relative paths are read from the manifest's folder. Blank
    lines and lines starting with ``#`` are skipped. Each recipe file is loaded
    once. The result goes straight to :func:`iter_batch` as its inputs.

    Raises
    ------
    BatchInputError
        Naming the manifest file and line (missing columns, empty cells, a recipe
        that does not load).
    """
    path = Path(path)
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except FileNotFoundError:
        raise BatchInputError(f"{path}: manifest file not found") from None
    except (OSError, UnicodeDecodeError) as e:
        raise BatchInputError(f"{path}: cannot read the manifest ({e}); save it as UTF-8 "
                              "CSV text") from None
    lines = [(i, ln) for i, ln in enumerate(text.splitlines(), 1)
             if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise BatchInputError(f"{path}: the manifest is empty; write a header line "
                              "'file,recipe' and one line per spectrum or pattern")
    dialect = csv.excel
    if lines[0][1].count(";") > lines[0][1].count(","):
        dialect = csv.excel
        dialect = type("semicolon", (csv.excel,), {"delimiter": ";"})
    reader = csv.reader([ln for _, ln in lines], dialect)
    rows = list(reader)
    header = [c.strip().lower() for c in rows[0]]
    if "file" not in header or "recipe" not in header:
        raise BatchInputError(f"{path}, line {lines[0][0]}: the header must name the columns "
                              f"'file' and 'recipe', found {rows[0]}")
    fi, ri = header.index("file"), header.index("recipe")
    base = path.resolve().parent
    recipes: dict[Path, Recipe] = {}
    out = []
    for (lineno, _), cells in zip(lines[1:], rows[1:]):
        if len(cells) <= max(fi, ri) or not cells[fi].strip() or not cells[ri].strip():
            raise BatchInputError(f"{path}, line {lineno}: needs a file (or pattern) and a "
                                  f"recipe, found {cells}")
        target, rfile = cells[fi].strip(), Path(cells[ri].strip()).expanduser()
        rfile = rfile if rfile.is_absolute() else base / rfile
        if rfile not in recipes:
            try:
                recipes[rfile] = load_recipe(rfile)
            except RecipeError as e:
                raise BatchInputError(f"{path}, line {lineno}: {e}") from None
        t = Path(target).expanduser()
        out.append((str(t if t.is_absolute() else base / t), recipes[rfile]))
    if not out:
        raise BatchInputError(f"{path}: the manifest has a header but no rows")
    return out


# ---------------------------------------------------------------------------------
# Rows
def summary_columns(*recipes: Recipe) -> list[str]:
    """Column names of the summary table for these recipes (all their layers and
    limits, first appearance first)."""
    head = ["index", "file", "sha256", "status", "verdict", "reason", "model"]
    if any(r.suggest_model for r in recipes):
        head.append("model_reason")
    body: list[str] = []
    for recipe in recipes:
        for layer in recipe.stack.layers:
            L = layer.name
            body += [f"{L}_thickness", f"{L}_thickness_sigma"]
            for wl in STANDARD_WAVELENGTHS_NM:
                body += [f"{L}_n@{wl}", f"{L}_k@{wl}"]
    body += ["band_gap", "band_gap_sigma", "redchi", "chisqr", "nfev", "warnings",
             "verdict_reasons"]
    for recipe in recipes:
        body += [k for k in recipe.limits]
    specs = [f"spec_{k}" for recipe in recipes for k in recipe.limits]
    if specs:
        body += specs + ["spec_pass"]
    tail = ["result_dir", "recipe_name", "recipe_hash", "software_version", "finished_utc",
            "elapsed_s"]
    return list(dict.fromkeys(head + body + tail))


def _quantity(result, key: str):
    m = re.match(r"^(?P<layer>.+)_(?P<q>[nk])@(?P<wl>[\d.]+)$", key)
    if m:
        oc = result.optical.get(m.group("layer"))
        if oc is None:
            return None
        n, k = oc.at(float(m.group("wl")))
        return finite_or_none(n if m.group("q") == "n" else k)
    if key == "band_gap":
        return None if result.band_gap is None else finite_or_none(result.band_gap.Eg_eV)
    if key == "redchi":
        return finite_or_none(result.redchi)
    p = result.params.get(key)
    return None if p is None else finite_or_none(p.value)


def result_verdict(result) -> tuple[str, tuple]:
    """The fit engine's verdict ("good", "check", "poor" or "" if it gives none) and reasons."""
    v = getattr(result, "verdict", None) if result is not None else None
    reasons = getattr(result, "verdict_reasons", None) if result is not None else None
    v = str(v).strip().lower() if v else ""
    return (v if v in VERDICTS else ""), tuple(str(r) for r in (reasons or ()))


def result_model(result) -> str | None:
    """The film model of a result: the suggestion's choice, else the model of the first
    film with a fitted thickness (a :data:`fitting.presets.MODEL_CHOICES` key)."""
    chosen = (getattr(result, "extra", None) or {}).get("model_suggestion", {}).get("chosen")
    if chosen:
        return str(chosen)
    layers = (getattr(result, "stack", None) or {}).get("layers") or []
    if not layers:
        return None
    pick = next((x for x in layers if (x.get("thickness") or {}).get("vary")), layers[0])
    try:
        # The choice depends on the model's kind and shape (its terms), not on the
        # fitted values: worked out once per shape, not once per spectrum.
        shape = json.dumps({k: v for k, v in pick["material"].items() if k != "params"},
                           sort_keys=True, default=str)
    except (AttributeError, TypeError, ValueError):
        shape = None
    if shape in _MODEL_OF_SHAPE:
        return _MODEL_OF_SHAPE[shape]
    try:
        from .dispersion import model_from_dict
        from .presets import model_choice_of
        choice = model_choice_of(model_from_dict(pick["material"]))
    except (PellucidError, KeyError, TypeError, ValueError, AttributeError):
        return None
    if shape is not None and len(_MODEL_OF_SHAPE) < 256:
        _MODEL_OF_SHAPE[shape] = choice
    return choice


#: Model choice per material shape (kind, terms, options), filled by :func:`result_model`.
_MODEL_OF_SHAPE: dict = {}


def summary_row(result, recipe: Recipe, *, index: int, path, sha256: str, rhash: str,
                status: str, reason: str = "", output: str = "",
                elapsed_s: float | None = None) -> dict:
    """The summary row of one spectrum (``result`` may be None for an unreadable file)."""
    row = dict.fromkeys(summary_columns(recipe))
    row.update(index=index, file=str(path), sha256=sha256, status=status, reason=reason,
               result_dir=output, recipe_name=recipe.name, recipe_hash=rhash,
               software_version=__version__,
               finished_utc=datetime.now(UTC).isoformat(timespec="seconds"),
               elapsed_s=None if elapsed_s is None else round(elapsed_s, 3))
    if result is not None:
        for layer in recipe.stack.layers:
            L = layer.name
            p = result.params.get(f"{L}_thickness")
            if p is not None:
                row[f"{L}_thickness"] = finite_or_none(p.value)
                row[f"{L}_thickness_sigma"] = finite_or_none(p.stderr)
            for wl in STANDARD_WAVELENGTHS_NM:
                row[f"{L}_n@{wl}"] = _quantity(result, f"{L}_n@{wl}")
                row[f"{L}_k@{wl}"] = _quantity(result, f"{L}_k@{wl}")
        if result.band_gap is not None:
            row["band_gap"] = finite_or_none(result.band_gap.Eg_eV)
            row["band_gap_sigma"] = finite_or_none(result.band_gap.sigma_eV)
        row.update(redchi=finite_or_none(result.redchi), chisqr=finite_or_none(result.chisqr),
                   nfev=result.nfev, warnings="; ".join(result.warnings),
                   model=result_model(result))
        if "model_reason" in row:
            row["model_reason"] = (result.extra.get("model_suggestion") or {}).get("reason")
        verdict, reasons = result_verdict(result)
        if status == "ok":
            row["verdict"] = verdict or None
        row["verdict_reasons"] = "; ".join(reasons) or None
        for key in recipe.limits:
            if row.get(key) is None:
                row[key] = _quantity(result, key)
    if recipe.limits:
        for key, lim in recipe.limits.items():
            row[f"spec_{key}"] = lim.check(row.get(key)) if status == "ok" else "n/a"
        row["spec_pass"] = overall_state(row[f"spec_{key}"] for key in recipe.limits)
    return row


# ---------------------------------------------------------------------------------
# One recipe made ready to fit, once per process
class Prepared:
    """A recipe with everything a fit needs built once: reader options, the fit engine,
    the reference spectra (100 % line and dark) and the provenance of all of them.

    Made by :func:`prepare`; a worker process makes one per recipe and reuses it for
    every spectrum.
    """

    def __init__(self, recipe: Recipe, *, rhash: str | None = None, identity: str | None = None,
                 reference_sha256: Mapping | None = None):
        self.recipe = recipe
        self.rhash = rhash or recipe_hash(recipe)
        from .fit import fit_spectrum
        from .reader import read_spectrum
        self.read_spectrum, self.fit_spectrum = read_spectrum, fit_spectrum
        self.options = recipe.reader_options()
        self.baseline = self.dark = None
        self.reference: dict = {}
        if recipe.reference:
            files = recipe.reference_files()
            if self.options.y_kind == "auto":
                # Raw signals are ratioed as read: never let one file be taken for %T.
                self.options = dataclasses.replace(self.options, y_kind="counts")
            for role in ("baseline", "dark"):
                if files.get(role) is None:
                    continue
                spec = self.read_spectrum(files[role], options=self.options)
                want = (reference_sha256 or {}).get(role)
                if want and spec.sha256 and spec.sha256 != want:
                    raise PellucidError(f"{files[role]}: the {_ROLE_WORDS[role]} changed after "
                                        f"the batch started; rerun the batch")
                setattr(self, role, spec)
                self.reference[role] = {"file": str(files[role]),
                                        "sha256": spec.sha256 or sha256_of_file(files[role])}
        self.identity = identity or recipe_identity(recipe, self.reference_sha256())

    def reference_sha256(self) -> dict:
        return {k: v["sha256"] for k, v in self.reference.items()}

    def fit(self, spectrum, *, stop=None, suggest=None):
        """Fit one spectrum the way the recipe says: (result, Suggestion or None).

        With ``fit.suggest_model`` (or ``suggest``: True or a tuple of model
        keys, overriding the recipe) the film models are ranked by
        :func:`fitting.suggest.suggest_model` and the chosen one's result is
        returned; otherwise the stack's own model is fitted.
        """
        stack, options = self.recipe.new_stack(), self.recipe.make_fit_options(spectrum)
        want = self.recipe.suggest_model if suggest is None else suggest
        if not want:
            return self.fit_spectrum(spectrum, stack, options, stop=stop), None
        from .suggest import suggest_model
        s = suggest_model(spectrum, stack, options, stop=stop,
                          families=want if isinstance(want, (tuple, list)) else None)
        return s.result, s

    def spectrum(self, path, content: bytes | None = None):
        """Read a spectrum file (or its ``content``, already read from ``path``) and apply
        the reference correction of the recipe."""
        if content is None:
            sp = self.read_spectrum(path, options=self.options)
        else:
            from .reader import parse_spectrum
            sp = parse_spectrum(content, options=self.options, source=str(path),
                                name=Path(path).stem)
        if self.baseline is not None:
            from .reference import reference_correct
            sp = reference_correct(sp, self.baseline, self.dark)
        return sp

    def provenance(self, path, sha256: str) -> dict:
        prov = {"software": f"pellucid {__version__}", "recipe_hash": self.rhash,
                "input_file": str(path), "input_sha256": sha256,
                "created": datetime.now(UTC).isoformat(timespec="seconds"),
                "recipe_name": self.recipe.name, "recipe_identity": self.identity}
        for role, ref in self.reference.items():
            prov[f"reference_{role}"] = f"{ref['file']} (sha256 {ref['sha256']})"
        return prov


_ROLE_WORDS = {"baseline": "100 % line", "dark": "dark spectrum"}


def prepare(recipe: Recipe) -> Prepared:
    """Make a recipe ready to fit (reads its reference files); raises PellucidError."""
    return Prepared(recipe)


#: Per-process cache: {run id: {recipe key: Prepared}} (only the current run is kept).
_PREPARED: dict[str, dict] = {}


def _prepared(context: Mapping, key: str) -> Prepared:
    run = context["run_id"]
    cache = _PREPARED.get(run)
    if cache is None:
        _PREPARED.clear()                       # another batch's recipes: flat memory
        cache = _PREPARED[run] = {}
    p = cache.get(key)
    if p is None:
        info = context["recipes"][key]
        p = cache[key] = Prepared(recipe_from_dict(info["recipe"]), rhash=info["hash"],
                                  identity=info["identity"],
                                  reference_sha256=info.get("reference_sha256"))
    return p


# ---------------------------------------------------------------------------------
# One spectrum (runs in a worker process, a Dask worker or in-process)
def _export(result, folder: Path, stem: str, provenance: dict, recipe: Recipe) -> list[str]:
    """The recipe's per-spectrum exports, exactly the parts it asks for."""
    if not recipe.exports:
        return []
    from .export import export_result      # matplotlib and the writers only when asked for
    parts = tuple(recipe.exports)
    plots = recipe.plot_formats if "plots" in parts else ()
    files = export_result(result, folder, stem=stem, provenance=provenance, plots=plots,
                          parts=parts)
    return [Path(f).name for f in files]


def _write_error(e: OSError, where: Path) -> str:
    target = e.filename or where
    if is_disk_full(e):
        return f"the disk is full (or read-only): cannot write {target}"
    return f"cannot write {target}: {e.strerror or e}"


def process_spectrum(task: Mapping, context: Mapping | None = None, *, stop=None) -> dict:
    """Read, fit and export one spectrum; write its marker last; return its summary row.

    Parameters
    ----------
    task : dict
        ``index``, ``path``, ``sha256``, ``folder`` (relative to the output
        folder) and ``recipe`` (a key of ``context["recipes"]``). Plain data.
    context : dict
        What every task of the batch shares, sent to each worker once:
        ``out_dir``, ``run_id`` and ``recipes`` (key -> ``{"recipe": dict,
        "hash", "identity", "reference_sha256"}``). Default: the context this
        worker process was started with.
    stop : threading.Event, optional
        In-process runs only: stops the fit; a stopped spectrum writes no marker
        and its row has status ``"stopped"``.

    Returns
    -------
    dict
        The summary row. Never raises for a bad file or a failed fit. A row
        whose writes hit a full disk carries ``"_halt"`` (the batch stops).
    """
    t0 = time.perf_counter()
    context = context if context is not None else _WORKER_CONTEXT
    out_dir = Path(context["out_dir"])
    index, path, sha = task["index"], Path(task["path"]), task["sha256"]
    folder = out_dir / task["folder"]
    output = Path(task["folder"]).as_posix()
    prep = None
    halt = ""

    def row(result, status, reason, output=output):
        recipe = prep.recipe if prep is not None else recipe_from_dict(
            context["recipes"][task["recipe"]]["recipe"])
        rhash = context["recipes"][task["recipe"]]["hash"]
        r = summary_row(result, recipe, index=index, path=path, sha256=sha, rhash=rhash,
                        status=status, reason=" ".join(str(reason).split()), output=output,
                        elapsed_s=time.perf_counter() - t0)
        if halt:
            r["_halt"] = halt
        return r

    try:
        prep = _prepared(context, task["recipe"])
    except PellucidError as e:
        return row(None, "error", str(e), "")
    # Read once: the bytes whose hash is checked are the bytes fitted (a file changed
    # after the check cannot slip in), and the file is not read a second time.
    try:
        content = path.read_bytes()
    except OSError as e:
        return row(None, "error", f"cannot read the file: {e.strerror or e}", "")
    if hashlib.sha256(content).hexdigest() != sha:
        return row(None, "error", "the file changed while the batch was running; rerun the "
                                  "batch with --resume to fit the new content", "")
    result, files, tb = None, [], ""
    # Local runs write without fsync (fitting.atomic.deferred_sync): the marker records
    # each file's SHA-256, a resume trusts only files that still match it, and the
    # parent writes everything back to disk now and then and before the summary.
    defer = bool(context.get("defer_sync"))
    try:
        spectrum = prep.spectrum(path, content)
        result, suggestion = prep.fit(spectrum, stop=stop)
        stopped = result.aborted or (suggestion is not None and suggestion.stopped)
        if stopped and stop is not None and stop.is_set():
            return row(result, "stopped", "stopped by the user")
        status, reason = ("ok", "") if result.success else ("failed", result.message or
                                                            "the fit did not converge")
        folder.mkdir(parents=True, exist_ok=True)
        with deferred_sync(defer):
            files = _export(result, folder, export_stem(path), prep.provenance(path, sha),
                            prep.recipe)
    except PellucidError as e:
        status, reason = "error", str(e)
    except MemoryError:
        status, reason = "error", "out of memory while fitting this spectrum"
    except OSError as e:
        # Writing the exports (disk full, permissions); named, not an "internal error".
        status, reason = "error", _write_error(e, folder)
        halt = reason if is_disk_full(e) else ""
    except Exception as e:          # a bug must not stop the batch; record it in full
        status = "error"
        reason = f"internal error ({type(e).__name__}: {e}); please report it"
        tb = traceback.format_exc()
    r = row(result, status, reason)
    if halt:
        return r                    # no marker: the spectrum is not done
    record = {"format": "pellucid-batch-record", "version": 3,
              "software": {"name": "pellucid", "version": __version__},
              "recipe_hash": prep.rhash, "recipe_identity": prep.identity,
              "run_id": context["run_id"],
              "input": {"path": str(path), "sha256": sha}, "reference": prep.reference,
              "finished_utc": r["finished_utc"], "row": r, "files": files}
    if result is not None:
        record["result"] = json_safe(result.to_dict(curves=False))
    if status == "error" and tb:
        record["traceback"] = tb
    try:
        folder.mkdir(parents=True, exist_ok=True)
        _remove_old_exports(folder, keep=set(files))
        record["files_sha256"] = {name: _sha(folder / name) for name in files}
        # Last: marks the spectrum done. Laid out by the C encoder, one line per key.
        with deferred_sync(defer):
            atomic_write_text(folder / MARKER_NAME, json_text(record))
        r["_marker"] = True
    except OSError as e:
        halt = _write_error(e, folder / MARKER_NAME) if is_disk_full(e) else ""
        r = row(result, "error", _write_error(e, folder / MARKER_NAME))
    except (ValueError, TypeError) as e:
        r = row(result, "error", f"internal error (the result record cannot be written: "
                                 f"{e}); please report it")
    return r


def _files_intact(folder: Path, rec: dict) -> bool:
    """Whether every file a marker lists has the SHA-256 the marker records.

    Markers of version 2 and older were written after an fsync of each file and
    record no hashes: they are trusted as they are.
    """
    if not isinstance(rec.get("version"), int) or rec["version"] < 3:
        return True
    hashes = rec.get("files_sha256")
    files = rec.get("files")
    if not isinstance(hashes, dict) or not isinstance(files, list):
        return False
    try:
        return all(isinstance(name, str) and hashes.get(name) == _sha(folder / name)
                   for name in files)
    except OSError:
        return False


def _remove_old_exports(folder: Path, keep: set) -> None:
    """Delete files an earlier run (another recipe) exported here and this one did not.

    Without this, a figure from last week's recipe could sit beside today's
    tables. Only files the old marker lists are touched.
    """
    old = (read_marker_record(folder) or {}).get("files", [])
    for name in old if isinstance(old, list) else []:
        if isinstance(name, str) and name not in keep and name == Path(name).name \
                and name != MARKER_NAME:
            (folder / name).unlink(missing_ok=True)


def _marker_row(out_dir: Path, folder: str, sha256: str, identity: str | None,
                run_id: str | None = None, *, verify: bool = False) -> dict | None:
    """The summary row an earlier (or this) run left for a spectrum, else None.

    Reused only if the marker names the same recipe identity (or, with ``run_id``,
    this run), input SHA-256 and Pellucid version, and the spectrum did not end in
    an internal error; with ``verify`` also only if every exported file it lists
    still has the SHA-256 it records (files written without fsync may be empty or
    old after a power cut: such a spectrum is fitted again).
    """
    rec = read_marker_record(out_dir / folder)
    if rec is None or (verify and not _files_intact(out_dir / folder, rec)):
        return None
    if run_id is not None:
        if rec.get("run_id") != run_id:
            return None
    elif identity is None or rec.get("recipe_identity") != identity:
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
# The plan: which file, which recipe, which folder
@dataclass
class _Plan:
    paths: list
    recipe_of: list                 # recipe key per path
    recipes: dict                   # key -> Recipe (resolved)
    prepared: dict                  # key -> Prepared (main process)
    ignored: list
    folders_given: list


def _plan(paths, recipe, figures: bool) -> _Plan:
    plain, pairs = [], []
    for item in (paths if not isinstance(paths, (str, os.PathLike)) else [paths]):
        if isinstance(item, tuple) and len(item) == 2 and isinstance(item[1], Recipe):
            pairs.append(item)
        else:
            plain.append(item)
    if plain and recipe is None:
        raise BatchInputError("no recipe given for the inputs "
                              f"{', '.join(map(str, plain[:3]))}")
    ignored, folders_given = [], []
    groups = ([(plain, recipe)] if plain else []) + [([p], r) for p, r in pairs]
    keyed: dict[int, str] = {}       # id of a given recipe -> its key (groups keep them alive)
    recipes: dict[str, Recipe] = {}
    out_paths, recipe_of, seen = [], [], set()
    for items, rec in groups:
        key = keyed.get(id(rec))
        if key is None:
            try:
                eff = _effective(rec, figures)
            except RecipeError as e:
                raise BatchInputError(f"the recipe {rec.name or ''!r} cannot be used: "
                                      f"{e}") from None
            key = keyed[id(rec)] = recipe_hash(eff)[:16]
            recipes.setdefault(key, eff)
        for p in expand_inputs(items, ignored=ignored, folders=folders_given):
            r = p.resolve()
            if r in seen:            # first assignment wins (a manifest row per pattern)
                continue
            seen.add(r)
            out_paths.append(p)
            recipe_of.append(key)
    prepared = {}
    for key, rec in recipes.items():
        try:
            prepared[key] = Prepared(rec)
        except PellucidError as e:
            raise BatchInputError(f"the recipe {rec.name or key!r} cannot be used: {e}") from None
    return _Plan(out_paths, recipe_of, recipes, prepared, ignored, folders_given)


def _effective(recipe: Recipe, figures: bool) -> Recipe:
    """The recipe as the batch runs it: absolute reference paths, figures if asked."""
    r = recipe.resolved()
    if not figures and "plots" in r.exports:
        r = dataclasses.replace(r, exports=tuple(e for e in r.exports if e != "plots"))
    return r


def _spreadsheet_reason(path: Path) -> str:
    return (f"{path}: a spreadsheet workbook ({path.suffix}), not a text table; open it in "
            f"the spreadsheet program, save the sheet as CSV (comma-separated text) and "
            f"add that file to the batch")


# ---------------------------------------------------------------------------------
def iter_batch(paths, recipe: Recipe | None, out_dir, *, jobs: int | None = None,
               resume: bool = False, stop=None, scheduler: str | None = None,
               report: bool = True, figures: bool = True) -> Iterator[BatchStep]:
    """Fit every spectrum with its recipe, yielding a :class:`BatchStep` as each finishes.

    Parameters
    ----------
    paths : iterable
        Spectrum files, folders or glob patterns (see :func:`expand_inputs`), or
        ``(path or pattern, Recipe)`` pairs giving an input its own recipe (see
        :func:`read_manifest`).
    recipe : Recipe or None
        For the inputs given without a recipe.
    out_dir : path-like
        Created if missing; holds ``summary.csv``, ``summary.json``,
        ``report.pdf``, ``recipe.json`` and ``spectra/<stem>-<hash>/``. Must be
        new, empty or an earlier batch's folder.
    jobs : int, optional
        Worker processes; default all cores; 1 runs in this process.
    resume : bool
        Skip spectra already done with the same recipe identity and input SHA-256.
    stop : threading.Event, optional
        Checked between spectra (and inside fits when ``jobs=1``); when set, no
        new spectrum is started and the generator ends after writing the summary.
    scheduler : str, optional
        Address of a Dask distributed scheduler to run on instead of local
        processes (``jobs`` is then ignored). The workers need the same Pellucid
        version, must see ``paths`` and ``out_dir`` at the same locations, and
        the cluster must be trusted (see the module docstring).
    report : bool
        Write ``report.pdf`` at the end (when :mod:`fitting.report` is installed).
    figures : bool
        False leaves out the per-spectrum figures even if a recipe asks for them
        (much faster; the report's summary figures are still drawn).

    Yields
    ------
    BatchStep
        In completion order (not input order); spectra done by an earlier run
        (``resume``) first.

    Returns
    -------
    BatchSummary
        As the generator's return value (``StopIteration.value``); see :func:`run_batch`.

    Raises
    ------
    BatchInputError
        Before any work: an input matches no file, a recipe's reference files
        are missing or unreadable, ``out_dir`` is not a folder or holds files a
        batch must not replace, ``jobs`` is invalid, another batch is writing
        into ``out_dir``, or the Dask scheduler cannot be reached.

    Examples
    --------
    >>> for step in iter_batch(["runs/"], load_recipe("r.json"), "out"):  # doctest: +SKIP
    ...     print(step.done, step.total, step.path.name, step.status)
    """
    t0 = time.perf_counter()
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise BatchInputError(f"{out_dir}: output path exists and is not a folder")
    if jobs is not None and (isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1):
        raise BatchInputError(f"jobs = {jobs!r}: must be a whole number of at least 1")
    if scheduler is None:
        start_workers_early(jobs)
    plan = _plan(paths, recipe, figures)
    # Results already in the output folder's own areas are never inputs.
    plan_keep = [(p, k) for p, k in zip(plan.paths, plan.recipe_of)
                 if not _inside_results(p, out_dir)]
    plan.paths = [p for p, _ in plan_keep]
    plan.recipe_of = [k for _, k in plan_keep]
    lock = None
    try:
        check_out_dir(out_dir, plan.paths, plan.folders_given)   # before creating anything
        out_dir.mkdir(parents=True, exist_ok=True)
        lock = FolderLock(out_dir).acquire()
        check_out_dir(out_dir, plan.paths, plan.folders_given)   # again, now it is ours
    except OutputFolderError as e:
        if lock is not None:
            lock.release()
        raise BatchInputError(str(e)) from None
    except OSError as e:
        raise BatchInputError(f"{out_dir}: cannot create or lock the output folder: "
                              f"{e.strerror or e}") from None
    try:
        return (yield from _batch(plan, out_dir, jobs, resume, stop, scheduler, report, t0))
    finally:
        lock.release()


def _inside_results(p: Path, out_dir: Path) -> bool:
    r, o = Path(p).resolve(), out_dir.resolve()
    return any(r.is_relative_to(o / d) for d in ("spectra", "recipes")) or (
        r.parent == o and r.name in ("summary.csv", "summary.json"))


# Row state per spectrum (one byte each, so the main process stays flat).
_TODO, _DONE, _SKIPPED, _IN_MEMORY = 0, 1, 2, 3


def _batch(plan: _Plan, out_dir: Path, jobs, resume, stop, scheduler, report, t0):
    run_id = uuid.uuid4().hex[:16]
    paths, total = plan.paths, len(plan.paths)
    recipes = plan.recipes
    single = len(recipes) == 1
    columns = summary_columns(*recipes.values())
    # Spectra's files are written without fsync where this process can write them back
    # itself (fitting.atomic.deferred_sync); a Dask cluster's workers may write on other
    # machines, so they keep the fsyncs.
    context = {"out_dir": str(out_dir), "run_id": run_id, "recipes": {},
               "defer_sync": not scheduler}
    for key, rec in recipes.items():
        prep = plan.prepared[key]
        d = rec.to_dict()
        d.pop("notes", None)                # workers need no free text
        context["recipes"][key] = {"recipe": d, "hash": prep.rhash, "identity": prep.identity,
                                   "reference_sha256": prep.reference_sha256()}
    header = {"software": {"name": "pellucid", "version": __version__},
              "recipe_hash": next(iter(context["recipes"].values()))["hash"] if single
              else None,
              "recipe_name": next(iter(recipes.values())).name if single else None,
              "recipes": [{"name": r.name, "hash": context["recipes"][k]["hash"],
                           "identity": context["recipes"][k]["identity"]}
                          for k, r in recipes.items()],
              "started_utc": datetime.now(UTC).isoformat(timespec="seconds"),
              "total": total, "run_id": run_id,
              "ignored_files": [str(p) for p in plan.ignored]}
    try:
        written = _write_recipes(out_dir, recipes, context)
        write_stamp(out_dir, written)
    except OSError as e:
        raise BatchInputError(f"{out_dir}: cannot write into the output folder: "
                              f"{e.strerror or e}") from None
    if resume:
        _remove_stale_temps(out_dir)

    # Hash every input once, here: the folder names must be unique over the whole list.
    shas: list[str] = []
    in_memory: dict[int, dict] = {}
    for i, p in enumerate(paths):
        try:
            shas.append(sha256_of_file(p))
        except OSError as e:
            shas.append("")
            in_memory[i] = summary_row(None, recipes[plan.recipe_of[i]], index=i, path=p,
                                       sha256="", rhash=context["recipes"][plan.recipe_of[i]][
                                           "hash"], status="error",
                                       reason=f"{p}: cannot read the file: {e.strerror or e}")
    folders = assign_folders(paths, shas)
    state = bytearray(total)
    counts = {s: 0 for s in STATUSES}
    verdicts = {v: 0 for v in VERDICTS}
    tally = {"done": 0, "skipped": 0}

    def record(i: int, r: dict, how: int) -> BatchStep:
        state[i] = how
        if how == _IN_MEMORY:
            in_memory[i] = r
        counts[r["status"]] = counts.get(r["status"], 0) + 1
        if r["status"] == "ok" and r.get("verdict") in verdicts:
            verdicts[r["verdict"]] += 1
        tally["done"] += 1
        tally["skipped"] += how == _SKIPPED
        if report and tally["done"] == 1:
            # The report's modules (matplotlib) load while the other spectra are
            # fitted, not after them: the parent only waits for results meanwhile.
            threading.Thread(target=_preload, args=("fitting.report",),
                             name="report-imports", daemon=True).start()
        return BatchStep(i, total, paths[i], r["status"], r.get("reason") or "", r,
                         tally["done"], how == _SKIPPED)

    # Unreadable files and spreadsheets have their row now; done spectra are skipped.
    for i, p in enumerate(paths):
        key = plan.recipe_of[i]
        if i in in_memory:
            yield record(i, in_memory.pop(i), _IN_MEMORY)
        elif p.suffix.lower() in SPREADSHEET_SUFFIXES:
            r = summary_row(None, recipes[key], index=i, path=p, sha256=shas[i],
                            rhash=context["recipes"][key]["hash"], status="error",
                            reason=_spreadsheet_reason(p))
            yield record(i, r, _IN_MEMORY)
        elif resume:
            old = _marker_row(out_dir, folders[i], shas[i], context["recipes"][key]["identity"],
                              verify=True)
            if old is not None:
                yield record(i, dict(old, index=i, file=str(p)), _SKIPPED)

    def tasks():
        for i in range(total):
            if state[i] == _TODO:
                yield {"index": i, "path": str(paths[i]), "sha256": shas[i],
                       "folder": folders[i], "recipe": plan.recipe_of[i]}

    todo = total - tally["done"]
    stopped, halted = False, ""
    active: set[int] = set()        # tasks started and not yet recorded
    halt = {"why": ""}
    local_stop = _AnyStop(stop, halt)
    writeback = _WriteBack(context["defer_sync"] and todo > 0)
    try:
        if todo:
            if scheduler:
                run = _run_dask(tasks(), context, scheduler, local_stop, active)
            elif (jobs or os.cpu_count() or 1) == 1 or todo == 1:
                run = _run_inline(tasks(), context, local_stop, active, stop)
            else:
                run = _run_pool(tasks(), context, min(jobs or os.cpu_count() or 1, todo),
                                local_stop, active,
                                figures=any("plots" in r.exports for r in recipes.values()))
            for task, r in run:
                i = task["index"]
                active.discard(i)
                why = r.pop("_halt", "")
                has_marker = r.pop("_marker", False)
                if why and not halt["why"]:
                    halt["why"] = why
                if r.get("status") == "stopped":
                    stopped = True
                    continue
                yield record(i, r, _DONE if has_marker else _IN_MEMORY)
        halted = halt["why"]
        stopped = stopped or bool(tally["done"] < total and (local_stop.is_set()))
    finally:
        # The spectra's files are on disk before the summary that lists them.
        writeback.stop()
        # An interrupt can land after a spectrum's marker was written but before its
        # row reached us: such spectra are done, their rows come from the markers.
        for i in list(active):
            old = _marker_row(out_dir, folders[i], shas[i], None, run_id) \
                if state[i] == _TODO else None
            if old is not None:
                record(i, old, _DONE)
        _, warning = _finish_summary(out_dir, plan, state, folders,
                                                   in_memory, columns, header)
    warnings = [warning] if warning else []
    pdfs, report_error = (), ""
    if report and tally["done"]:
        pdfs, report_error = _write_reports(out_dir, plan, state, folders, in_memory, context)
    if pdfs:
        try:
            write_stamp(out_dir, {p.name: _sha(p) for p in pdfs})
        except OSError as e:
            warnings.append(f"the output folder's stamp could not be updated: {e.strerror}")
    return BatchSummary(total, dict(counts), out_dir, out_dir / "summary.csv",
                        out_dir / "summary.json",
                        header["recipe_hash"] or "", time.perf_counter() - t0, stopped,
                        pdfs[0] if len(pdfs) == 1 else None, report_error, tally["skipped"],
                        dict(verdicts), halted, tuple(warnings), tuple(pdfs),
                        tuple(plan.ignored))


#: Seconds between two write-backs of the spectra's files during a batch: what a power
#: cut can cost at most (the spectra of the last interval are fitted again on resume).
WRITE_BACK_INTERVAL_S = 30.0


class _WriteBack:
    """Writes the batch's files back to disk every :data:`WRITE_BACK_INTERVAL_S`.

    Each spectrum's files are written without fsync (see
    :func:`fitting.atomic.deferred_sync`): atomic against a killed run, but only
    durable once the OS writes them back. A thread of the parent calls
    :func:`~fitting.atomic.flush_to_disk` now and then, and :meth:`stop` once
    more at the end, so a power cut costs at most the last interval's spectra,
    which a resume finds by their markers' hashes and fits again.
    """

    def __init__(self, enabled: bool):
        self.done = threading.Event()
        self.thread = None
        if enabled:
            self.thread = threading.Thread(target=self._loop, name="write-back", daemon=True)
            self.thread.start()

    def _loop(self):
        while not self.done.wait(WRITE_BACK_INTERVAL_S):
            flush_to_disk()

    def stop(self) -> None:
        if self.thread is None:
            return
        self.done.set()
        self.thread.join()
        self.thread = None
        flush_to_disk()


class _AnyStop:
    """The caller's stop event or the batch's own halt (a full disk)."""

    def __init__(self, stop, halt):
        self.stop, self.halt = stop, halt

    def is_set(self) -> bool:
        return bool(self.halt["why"]) or (self.stop is not None and self.stop.is_set())


def _sha(path: Path) -> str:
    import hashlib
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def _write_recipes(out_dir: Path, recipes: Mapping, context) -> dict:
    """recipe.json (one recipe) or recipes/<name>-<hash>.json (several); returns {name: sha}."""
    written = {}
    if len(recipes) == 1:
        (rec,) = recipes.values()
        p = atomic_write_json(out_dir / "recipe.json", rec.to_dict())
        written["recipe.json"] = _sha(p)
    else:
        (out_dir / "recipes").mkdir(exist_ok=True)
        for key, rec in recipes.items():
            atomic_write_json(out_dir / "recipes" / f"{safe_stem(rec.name or 'recipe')}-"
                                                    f"{context['recipes'][key]['hash'][:10]}"
                                                    f".json", rec.to_dict())
        written["recipes"] = None
    written["spectra"] = None
    return written


def _rows_in_order(out_dir, plan, state, folders, in_memory, *, keys=None):
    """Every recorded spectrum's row in input order, from its marker (the truth)."""
    for i, st in enumerate(state):
        if st in (_DONE, _SKIPPED):
            rec = read_marker_record(out_dir / folders[i])
            row = (rec or {}).get("row")
            if not isinstance(row, dict):
                continue
            row = dict(row, index=i, file=str(plan.paths[i]))
        elif st == _IN_MEMORY:
            row = in_memory[i]
        else:
            continue
        yield row if keys is None else {k: v for k, v in row.items() if keys(k)}


def _finish_summary(out_dir, plan, state, folders, in_memory, columns, header):
    """Write the summary files and record them in the folder's stamp: (written, warning)."""
    if not any(state):
        return {}, ""
    written, warning = write_summary_files(
        out_dir, lambda: _rows_in_order(out_dir, plan, state, folders, in_memory),
        columns, header)
    if written:
        try:
            write_stamp(out_dir, written)
        except OSError as e:
            warning = warning or f"the output folder's stamp could not be updated: {e.strerror}"
    return written, warning


def _remove_stale_temps(out_dir: Path) -> None:
    # Temporary files of atomic writes interrupted by a kill; never a finished file.
    for pattern in (".*.tmp", "spectra/*/.*.tmp"):
        for f in out_dir.glob(pattern):
            f.unlink(missing_ok=True)


# ---------------------------------------------------------------------------------
# The report
def _report_key(k: str) -> bool:
    return (k in ("index", "file", "sha256", "status", "verdict", "verdict_reasons", "reason",
                  "warnings", "redchi", "spec_pass", "result_dir", "band_gap")
            or k.endswith(("_thickness", "_thickness_sigma", "_n@633")) or k.startswith("spec_"))


def _preload(module: str) -> None:
    """Import ``module`` (in a background thread); a failure shows when it is used."""
    try:
        importlib.import_module(module)
    except Exception:               # noqa: BLE001 - the real import reports it later
        pass


def _write_reports(out_dir, plan, state, folders, in_memory, context):
    """One PDF per recipe (``report.pdf`` for a one-recipe batch): (paths, error text)."""
    from .report import write_batch_report
    keys = list(plan.recipes)
    pdfs, errors = [], []
    for key in keys:
        rec = plan.recipes[key]
        limit_keys = set(rec.limits)
        rows = [r for r in _rows_in_order(out_dir, plan, state, folders, in_memory,
                                          keys=lambda k, lk=limit_keys: _report_key(k) or k in lk)
                if len(keys) == 1 or plan.recipe_of[r["index"]] == key]
        if not rows:
            continue
        name = "report.pdf" if len(keys) == 1 else \
            f"report-{safe_stem(rec.name or 'recipe')}-{context['recipes'][key]['hash'][:8]}.pdf"
        try:
            write_batch_report(rows, out_dir, out_dir / name, recipe=rec,
                               spec=rec.limits or None)
            pdfs.append(out_dir / name)
        except Exception as e:      # the report is a courtesy; the results stand without it
            errors.append(f"the PDF report {name} could not be written: "
                          f"{type(e).__name__}: {e}")
    return tuple(pdfs), "; ".join(errors)


# ---------------------------------------------------------------------------------
# Runners: each yields (task, row) as spectra finish
def _run_inline(tasks, context, stop, active, fit_stop):
    for task in tasks:
        if stop.is_set():
            return
        active.add(task["index"])
        yield task, process_spectrum(task, context, stop=fit_stop)


def _crash_row(task, context, why: str) -> dict:
    info = context["recipes"][task["recipe"]]
    recipe = recipe_from_dict(info["recipe"])
    return summary_row(None, recipe, index=task["index"], path=task["path"],
                       sha256=task["sha256"], rhash=info["hash"], status="error", reason=why)


#: The context of the batch this worker process serves (set once, by the pool).
_WORKER_CONTEXT: dict | None = None


def _worker_setup(context: Mapping, figures: bool) -> None:
    """Once per worker process: keep the context, build every recipe, load the modules."""
    global _WORKER_CONTEXT
    _WORKER_CONTEXT = dict(context)
    import fitting.export  # noqa: F401
    if figures:
        import fitting.plots  # noqa: F401
    for key in context["recipes"]:
        try:
            _prepared(context, key)
        except PellucidError:
            pass                     # reported per spectrum


def _pool_task(task):
    return process_spectrum(task)


_CRASH_REASON = ("a worker process crashed twice while this spectrum was being fitted "
                 "(out of memory?); it was skipped")


def _run_pool(tasks, context, jobs: int, stop, active, *, figures=False):
    """Local worker processes, at most 2 x jobs tasks in flight (flat memory)."""
    from .pool import WorkerPool

    def new_pool():
        return WorkerPool(jobs, initializer=_worker_setup, initargs=(context, figures),
                          preload=BATCH_PRELOAD)

    retry: list = []                 # tasks to run again after a worker crash
    crashes: dict[int, int] = {}
    pool = new_pool()
    inflight: dict = {}
    finished = False
    try:
        while True:
            broken = False
            while len(inflight) < 2 * jobs and not stop.is_set():
                task = retry.pop() if retry else next(tasks, None)
                if task is None:
                    break
                try:
                    inflight[pool.submit(_pool_task, task)] = task
                except BrokenProcessPool:
                    retry.append(task)
                    broken = True
                    break
                active.add(task["index"])
            if stop.is_set():
                # Not yet started: drop. Running: let them finish, so nothing done is lost.
                for fut in [f for f in inflight if f.cancel()]:
                    active.discard(inflight.pop(fut)["index"])
            if not inflight and not broken:
                break
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
                        retry.append(task)
                        continue
                    r = _crash_row(task, context, _CRASH_REASON)
                except Exception as e:
                    r = _crash_row(task, context, f"worker error: {type(e).__name__}: {e}")
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
                        retry.append(task)
                    else:
                        yield task, _crash_row(task, context, _CRASH_REASON)
                inflight.clear()
                pool.terminate()
                pool = new_pool()
        finished = True
    finally:
        if finished:
            pool.shutdown(wait=True)
        else:
            pool.terminate()         # Ctrl-C, SIGTERM, an error: end the workers now


def _run_dask(tasks, context, address: str, stop, active):
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
        # The shared context goes to every worker once; tasks refer to it.
        ctx = client.scatter([context], broadcast=True, hash=False)[0]
        inflight: dict = {}

        def submit(task):
            fut = client.submit(process_spectrum, task, ctx, pure=False)
            inflight[fut.key] = (fut, task)
            active.add(task["index"])
            return fut

        # A bounded window keeps the scheduler's memory flat for long batches.
        first = []
        for task in tasks:
            first.append(submit(task))
            if len(first) >= 4 * nworkers:
                break
        ac = as_completed(first, loop=client.loop)
        for fut in ac:
            _, task = inflight.pop(fut.key)
            try:
                r = fut.result()
            except Exception as e:
                r = _crash_row(task, context, f"Dask worker error: {type(e).__name__}: {e}")
            fut.release()
            yield task, r
            if stop.is_set():
                client.cancel([f for f, _ in inflight.values()])
                return
            task = next(tasks, None)
            if task is not None:
                ac.add(submit(task))
    finally:
        client.close()


def run_batch(paths, recipe: Recipe | None, out_dir, *, on_step=None, **kw) -> BatchSummary:
    """Run :func:`iter_batch` to the end; call ``on_step(step)`` for each step."""
    gen = iter_batch(paths, recipe, out_dir, **kw)
    while True:
        try:
            step = next(gen)
        except StopIteration as e:
            return e.value
        if on_step is not None:
            on_step(step)
