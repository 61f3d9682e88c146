"""Projects: a recipe together with the spectra it is applied to and their results.

A project is what the desktop app saves and reopens: the recipe, the list of
spectrum files with the SHA-256 of each (so a changed or swapped file is
noticed), the reference correction applied to the spectrum, the last fit result
in full (so a reopened project shows it, curves and all) and one summary row per
fitted spectrum (the same rows as the batch runner's ``summary.json``). Like
recipes it is plain, versioned JSON, saved atomically and validated on load.

File format ``pellucid-project``, version 2
-------------------------------------------
::

    {
      "format": "pellucid-project",
      "version": 2,
      "name": "line 3, week 12",
      "recipe": { ... },                      # a complete pellucid-recipe document
      "spectra": [                            # paths relative to the project file
        {"path": "spectra/s001.csv", "sha256": "9f2c..."}
      ],
      "reference": {                          # null: the spectrum is used as read
        "baseline": {"path": "ref/baseline_100pct.txt", "sha256": "..."},
        "dark": {"path": "ref/dark.txt", "sha256": "..."},   # or null
        "raw_counts": true                    # all three files read as raw counts
      },
      "result": {                             # null: no fit stored
        "fit": { ... },                       # FitResult.to_dict(curves=True)
        "recipe_hash": "3f2a...",             # hash of the recipe that produced it
        "current": true                       # false: the setup changed after the fit
      },
      "results": [ {"file": ..., "status": "ok", "film_thickness": 498.7, ...} ]
    }

The reference correction (T = (S - D) / (B - D), :func:`fitting.reference.reference_correct`)
applies to the first spectrum, the one the desktop app shows; its files are
checked for change like the spectra.

Paths are written relative to the project file's folder when the file lies
below it (POSIX separators, so projects move between machines), else absolute.

Versions
--------
1
    ``format``, ``version``, ``name``, ``recipe``, ``spectra``, ``results``.
2
    adds ``reference`` and ``result``. A version-1 file is read as version 2
    with both null (:func:`upgrade`): it opens with its summary rows but no
    stored fit, exactly as before.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from collections.abc import Mapping

from .atomic import atomic_write_text
from .errors import RecipeError
from .jsonsafe import json_safe
from .recipe import Recipe, recipe_from_dict
from .spectrum import sha256_of_file

__all__ = ["Project", "SpectrumRef", "Reference", "StoredResult", "load_project",
           "save_project", "project_from_batch", "fit_result_from_dict", "upgrade",
           "PROJECT_FORMAT", "PROJECT_VERSION"]

PROJECT_FORMAT = "pellucid-project"
PROJECT_VERSION = 2
_HEX = set("0123456789abcdef")


@dataclass(frozen=True)
class SpectrumRef:
    """A spectrum file and the SHA-256 of its bytes when it was added."""

    path: Path
    sha256: str

    @classmethod
    def of(cls, path) -> SpectrumRef:
        p = Path(path).resolve()
        return cls(p, sha256_of_file(p))

    def problem(self) -> str | None:
        """None if the file is present and unchanged, else what is wrong."""
        if not self.path.is_file():
            return f"{self.path}: file not found"
        if sha256_of_file(self.path) != self.sha256:
            return f"{self.path}: file changed since it was added (SHA-256 differs)"
        return None


@dataclass(frozen=True)
class Reference:
    """The reference correction of a project's spectrum: 100 % line, optional dark.

    ``raw_counts`` says the sample, baseline and dark files are all read as raw
    detector counts (``ReaderOptions(y_kind="counts")``), which is how the
    desktop app's correction reads them by default.
    """

    baseline: SpectrumRef
    dark: SpectrumRef | None = None
    raw_counts: bool = True

    @classmethod
    def of(cls, baseline, dark=None, *, raw_counts: bool = True) -> Reference:
        return cls(SpectrumRef.of(baseline), SpectrumRef.of(dark) if dark else None,
                   bool(raw_counts))

    def problems(self) -> list[str]:
        return [p for p in (r.problem() for r in (self.baseline, self.dark) if r) if p]


@dataclass(frozen=True)
class StoredResult:
    """The last fit of the project: the full result and the recipe hash that made it.

    ``current`` is False when the setup was changed after the fit, so a reopened
    project marks the result as out of date just as the app did before saving.
    """

    fit: object                      # fitting.result.FitResult
    recipe_hash: str = ""
    current: bool = True


@dataclass
class Project:
    """A recipe, the spectra it applies to, and one result summary row per spectrum."""

    recipe: Recipe
    spectra: list = field(default_factory=list)
    results: list = field(default_factory=list)
    name: str = ""
    reference: Reference | None = None
    result: StoredResult | None = None

    def add_spectrum(self, path) -> SpectrumRef:
        """Add a file (its hash is taken now); adding the same path again replaces it."""
        ref = SpectrumRef.of(path)
        self.spectra = [r for r in self.spectra if r.path != ref.path] + [ref]
        return ref

    def check_spectra(self) -> list[str]:
        """Problems with the referenced files (missing, changed); empty if all is well."""
        out = [p for p in (r.problem() for r in self.spectra) if p]
        if self.reference is not None:
            out += [f"reference correction: {p}" for p in self.reference.problems()]
        return out

    def to_dict(self, *, base: Path | None = None) -> dict:
        ref = None
        if self.reference is not None:
            r = self.reference
            ref = {"baseline": _ref_dict(r.baseline, base),
                   "dark": None if r.dark is None else _ref_dict(r.dark, base),
                   "raw_counts": r.raw_counts}
        res = None
        if self.result is not None:
            res = {"fit": json_safe(self.result.fit.to_dict(curves=True)),
                   "recipe_hash": self.result.recipe_hash, "current": bool(self.result.current)}
        return {"format": PROJECT_FORMAT, "version": PROJECT_VERSION, "name": self.name,
                "recipe": self.recipe.to_dict(),
                "spectra": [_ref_dict(r, base) for r in self.spectra],
                "reference": ref, "result": res,
                "results": [dict(r) for r in self.results]}

    @classmethod
    def from_dict(cls, d: Mapping, *, base: Path | None = None, path=None) -> Project:
        def err(f, problem):
            return RecipeError(f, problem, path=path)

        d = upgrade(d, path=path)
        extra = set(d) - {"format", "version", "name", "recipe", "spectra", "reference",
                          "result", "results"}
        if extra:
            raise err(sorted(extra)[0], "unknown field")
        if not isinstance(d.get("name", ""), str):
            raise err("name", "must be text")
        try:
            recipe = recipe_from_dict(d.get("recipe"))
        except RecipeError as e:
            raise err(f"recipe.{e.field}", e.problem) from None
        items = d.get("spectra", [])
        if not isinstance(items, list):
            raise err("spectra", "must be a list")
        spectra = [_ref_from(s, f"spectra[{i}]", base, err) for i, s in enumerate(items)]
        reference = None
        rd = d.get("reference")
        if rd is not None:
            if not isinstance(rd, Mapping) or set(rd) != {"baseline", "dark", "raw_counts"}:
                raise err("reference", 'must be null or {"baseline": ..., "dark": ..., '
                                       '"raw_counts": ...}')
            if not isinstance(rd["raw_counts"], bool):
                raise err("reference.raw_counts", "must be true or false")
            reference = Reference(
                _ref_from(rd["baseline"], "reference.baseline", base, err),
                None if rd["dark"] is None else _ref_from(rd["dark"], "reference.dark",
                                                          base, err),
                rd["raw_counts"])
        stored = None
        sd = d.get("result")
        if sd is not None:
            if not isinstance(sd, Mapping) or set(sd) != {"fit", "recipe_hash", "current"}:
                raise err("result", 'must be null or {"fit": ..., "recipe_hash": ..., '
                                    '"current": ...}')
            if not isinstance(sd["recipe_hash"], str):
                raise err("result.recipe_hash", "must be text")
            if not isinstance(sd["current"], bool):
                raise err("result.current", "must be true or false")
            try:
                fit = fit_result_from_dict(sd["fit"])
            except RecipeError as e:
                raise err(f"result.fit.{e.field}", e.problem) from None
            stored = StoredResult(fit, sd["recipe_hash"], sd["current"])
        results = d.get("results", [])
        if not isinstance(results, list) or not all(isinstance(r, Mapping) for r in results):
            raise err("results", "must be a list of objects")
        return cls(recipe, spectra, [dict(r) for r in results], d.get("name", ""),
                   reference, stored)


def upgrade(d: Mapping, *, path=None) -> dict:
    """Check format and version and bring an older project dict to the current version.

    Version 1 -> 2 adds ``"reference": null`` and ``"result": null``. The input is
    not modified. A newer version than this Pellucid knows is refused.
    """
    if not isinstance(d, Mapping):
        raise RecipeError("(file)", "must be a JSON object", path=path)
    if d.get("format") != PROJECT_FORMAT:
        raise RecipeError("format", f"expected {PROJECT_FORMAT!r}, found {d.get('format')!r}",
                          path=path)
    v = d.get("version")
    if isinstance(v, bool) or not isinstance(v, int) or not 1 <= v <= PROJECT_VERSION:
        raise RecipeError("version", f"unknown project version {v!r}; this Pellucid reads "
                                     f"versions 1 to {PROJECT_VERSION}", path=path)
    d = dict(d)
    if v == 1:
        for k in ("reference", "result"):
            if k in d:
                raise RecipeError(k, "unknown field in a version-1 project", path=path)
        d.update(version=2, reference=None, result=None)
    return d


def _ref_dict(r: SpectrumRef, base: Path | None) -> dict:
    return {"path": _portable(r.path, base), "sha256": r.sha256}


def _ref_from(s, where: str, base: Path | None, err) -> SpectrumRef:
    if not isinstance(s, Mapping) or set(s) != {"path", "sha256"}:
        raise err(where, 'must be {"path": ..., "sha256": ...}')
    if not isinstance(s["path"], str) or not s["path"]:
        raise err(f"{where}.path", "must be a file path")
    sha = s["sha256"]
    if not isinstance(sha, str) or len(sha) != 64 or not set(sha) <= _HEX:
        raise err(f"{where}.sha256", "must be 64 lower-case hex digits")
    p = Path(s["path"])
    if not p.is_absolute() and base is not None:
        p = base / p
    return SpectrumRef(p.resolve() if base is not None else p, sha)


def _portable(p: Path, base: Path | None) -> str:
    if base is not None:
        try:
            return Path(os.path.relpath(p, base)).as_posix() if Path(p).resolve().is_relative_to(
                base.resolve()) else str(p)
        except ValueError:       # another drive on Windows
            pass
    return str(p)


# -- a FitResult back from its JSON ---------------------------------------------------
def fit_result_from_dict(d: Mapping):
    """Rebuild a :class:`fitting.result.FitResult` from ``FitResult.to_dict(curves=True)``.

    The reading is :meth:`fitting.result.FitResult.from_dict` (every record typed:
    diagnostics, uncertainty budgets, Kramers-Kronig checks); kept here under its
    old name for callers of this module.

    Raises
    ------
    RecipeError
        naming the field, if the dict is not such a result.
    """
    from . import result
    return result.FitResult.from_dict(d)


def save_project(project: Project, path) -> Path:
    """Write a project file atomically; file paths become relative where possible."""
    path = Path(path)
    d = project.to_dict(base=path.resolve().parent)
    return atomic_write_text(path, json.dumps(d, indent=2, ensure_ascii=False,
                                              allow_nan=False) + "\n")


def load_project(path) -> Project:
    """Read and validate a project file (errors name the file and the field)."""
    path = Path(path)
    try:
        d = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise RecipeError("(file)", "file not found", path=path) from None
    except (OSError, UnicodeDecodeError) as e:
        raise RecipeError("(file)", f"cannot be read: {e}", path=path) from None
    except json.JSONDecodeError as e:
        raise RecipeError("(file)", f"not valid JSON at line {e.lineno}, column {e.colno}: "
                                    f"{e.msg}", path=path) from None
    return Project.from_dict(d, base=path.resolve().parent, path=path)


def project_from_batch(out_dir) -> Project:
    """A project from a batch output folder (its recipe.json and summary.json).

    Every spectrum of the summary with a known SHA-256 becomes a reference, and
    the summary rows become the project's results, so a finished overnight run
    can be opened and browsed in the app.
    """
    out_dir = Path(out_dir)
    summary_path = out_dir / "summary.json"
    try:
        summary = json.loads(summary_path.read_text(encoding="utf-8"))
        recipe_d = json.loads((out_dir / "recipe.json").read_text(encoding="utf-8"))
    except FileNotFoundError as e:
        raise RecipeError("(file)", "not a batch output folder (missing "
                                    f"{Path(e.filename).name})", path=out_dir) from None
    except (OSError, ValueError) as e:
        raise RecipeError("(file)", f"cannot be read: {e}", path=out_dir) from None
    recipe = recipe_from_dict(recipe_d, path=out_dir / "recipe.json")
    rows = summary.get("rows", []) if isinstance(summary, dict) else []
    refs = [SpectrumRef(Path(r["file"]), r["sha256"]) for r in rows
            if isinstance(r, dict) and r.get("sha256") and r.get("file")]
    return Project(recipe, refs, [dict(r) for r in rows if isinstance(r, dict)],
                   name=recipe.name)
