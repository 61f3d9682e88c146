"""Projects: a recipe together with the spectra it is applied to and their results.

A project is what the desktop app saves and reopens: the recipe, the list of
spectrum files with the SHA-256 of each (so a changed or swapped file is
noticed), and one summary row per fitted spectrum (the same rows as the batch
runner's ``summary.json``). Like recipes it is plain, versioned JSON, saved
atomically and validated on load.

File format ``pellucid-project``, version 1
-------------------------------------------
::

    {
      "format": "pellucid-project",
      "version": 1,
      "name": "line 3, week 12",
      "recipe": { ... },                      # a complete pellucid-recipe document
      "spectra": [                            # paths relative to the project file
        {"path": "spectra/s001.csv", "sha256": "9f2c..."}
      ],
      "results": [ {"file": ..., "status": "ok", "film_thickness": 498.7, ...} ]
    }

Paths are written relative to the project file's folder when the spectrum lies
below it (POSIX separators, so projects move between machines), else absolute.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping

from .atomic import atomic_write_text
from .errors import RecipeError
from .recipe import Recipe, recipe_from_dict
from .spectrum import sha256_of_file

__all__ = ["Project", "SpectrumRef", "load_project", "save_project", "project_from_batch",
           "PROJECT_FORMAT", "PROJECT_VERSION"]

PROJECT_FORMAT = "pellucid-project"
PROJECT_VERSION = 1
_HEX = set("0123456789abcdef")


@dataclass(frozen=True)
class SpectrumRef:
    """A spectrum file and the SHA-256 of its bytes when it was added."""

    path: Path
    sha256: str

    @classmethod
    def of(cls, path) -> "SpectrumRef":
        p = Path(path).resolve()
        return cls(p, sha256_of_file(p))

    def problem(self) -> str | None:
        """None if the file is present and unchanged, else what is wrong."""
        if not self.path.is_file():
            return f"{self.path}: file not found"
        if sha256_of_file(self.path) != self.sha256:
            return f"{self.path}: file changed since it was added (SHA-256 differs)"
        return None


@dataclass
class Project:
    """A recipe, the spectra it applies to, and one result summary row per spectrum."""

    recipe: Recipe
    spectra: list = field(default_factory=list)
    results: list = field(default_factory=list)
    name: str = ""

    def add_spectrum(self, path) -> SpectrumRef:
        """Add a file (its hash is taken now); adding the same path again replaces it."""
        ref = SpectrumRef.of(path)
        self.spectra = [r for r in self.spectra if r.path != ref.path] + [ref]
        return ref

    def check_spectra(self) -> list[str]:
        """Problems with the referenced files (missing, changed); empty if all is well."""
        return [p for p in (r.problem() for r in self.spectra) if p]

    def to_dict(self, *, base: Path | None = None) -> dict:
        return {"format": PROJECT_FORMAT, "version": PROJECT_VERSION, "name": self.name,
                "recipe": self.recipe.to_dict(),
                "spectra": [{"path": _portable(r.path, base), "sha256": r.sha256}
                            for r in self.spectra],
                "results": [dict(r) for r in self.results]}

    @classmethod
    def from_dict(cls, d: Mapping, *, base: Path | None = None, path=None) -> "Project":
        def err(f, problem):
            return RecipeError(f, problem, path=path)

        if not isinstance(d, Mapping):
            raise err("(file)", "must be a JSON object")
        if d.get("format") != PROJECT_FORMAT:
            raise err("format", f"expected {PROJECT_FORMAT!r}, found {d.get('format')!r}")
        v = d.get("version")
        if isinstance(v, bool) or not isinstance(v, int) or not 1 <= v <= PROJECT_VERSION:
            raise err("version", f"unknown project version {v!r}; this Pellucid reads "
                                 f"version {PROJECT_VERSION}")
        extra = set(d) - {"format", "version", "name", "recipe", "spectra", "results"}
        if extra:
            raise err(sorted(extra)[0], "unknown field")
        if not isinstance(d.get("name", ""), str):
            raise err("name", "must be text")
        try:
            recipe = recipe_from_dict(d.get("recipe"))
        except RecipeError as e:
            raise err(f"recipe.{e.field}", e.problem) from None
        spectra = []
        items = d.get("spectra", [])
        if not isinstance(items, list):
            raise err("spectra", "must be a list")
        for i, s in enumerate(items):
            w = f"spectra[{i}]"
            if not isinstance(s, Mapping) or set(s) != {"path", "sha256"}:
                raise err(w, 'must be {"path": ..., "sha256": ...}')
            if not isinstance(s["path"], str) or not s["path"]:
                raise err(f"{w}.path", "must be a file path")
            sha = s["sha256"]
            if not isinstance(sha, str) or len(sha) != 64 or not set(sha) <= _HEX:
                raise err(f"{w}.sha256", "must be 64 lower-case hex digits")
            p = Path(s["path"])
            if not p.is_absolute() and base is not None:
                p = base / p
            spectra.append(SpectrumRef(p.resolve() if base is not None else p, sha))
        results = d.get("results", [])
        if not isinstance(results, list) or not all(isinstance(r, Mapping) for r in results):
            raise err("results", "must be a list of objects")
        return cls(recipe, spectra, [dict(r) for r in results], d.get("name", ""))


def _portable(p: Path, base: Path | None) -> str:
    if base is not None:
        try:
            return Path(os.path.relpath(p, base)).as_posix() if Path(p).resolve().is_relative_to(
                base.resolve()) else str(p)
        except ValueError:       # another drive on Windows
            pass
    return str(p)


def save_project(project: Project, path) -> Path:
    """Write a project file atomically; spectrum paths become relative where possible."""
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
