"""The batch output folder: who may write it, where each spectrum goes, and the summary.

What lives in a batch output folder ``DIR`` (see :mod:`fitting.batch`)::

    DIR/.pellucid-batch.json      ownership stamp: the files this batch wrote, by SHA-256
    DIR/.pellucid-batch.lock      held (operating-system lock) while a batch runs
    DIR/recipe.json               the exact recipe (one-recipe batches)
    DIR/recipes/<name>-<hash>.json   each recipe (batches with several recipes)
    DIR/summary.csv, summary.json one row per spectrum, rebuilt from the markers at the end
    DIR/report.pdf                the batch report (report-<recipe>.pdf per recipe if several)
    DIR/spectra/<stem>-<sha256[:10]>/   one spectrum's exports and its marker result.json

Rules that keep a user's files safe:

* **Ownership.** A batch writes into ``DIR`` only if ``DIR`` is new or empty, or
  was written by an earlier batch (its stamp, or for folders of older versions a
  ``summary.json`` of the batch format), and every file it would replace is
  byte-for-byte the one a batch wrote. A user's own ``recipe.json`` or
  ``summary.csv`` in ``DIR`` (or one edited since) makes the batch refuse before
  it starts, naming the file: :func:`check_out_dir`.
* **One batch per folder.** :class:`FolderLock` takes an operating-system lock
  (``flock`` on POSIX, ``msvcrt.locking`` on Windows) on the lock file. The
  kernel drops it when the process ends in any way, so there are no stale locks
  to take over and no race between two batches starting at once; an empty or
  damaged lock file is simply reused.
* **Distinct folders.** Each spectrum's folder name is its file stem made safe
  (letters, digits, ``. _ -``) plus the first 10 hex digits of its SHA-256; two
  inputs that would get the same folder (``a b.csv`` and ``a_b.csv`` with equal
  content, or equal names in two folders) get ``-2``, ``-3`` ...:
  :func:`assign_folders`.
"""

from __future__ import annotations

import csv
import errno
import hashlib
import json
import math
import os
import re
import socket
import time
from datetime import UTC, datetime
from pathlib import Path
from collections.abc import Iterable, Mapping

from . import __version__
from .atomic import atomic_write_json, atomic_writer
from .errors import PellucidError
from .jsonsafe import json_safe

__all__ = ["FolderLock", "check_out_dir", "assign_folders", "safe_stem", "export_stem",
           "write_stamp", "write_summary_files", "read_marker_record", "is_disk_full",
           "OutputFolderError", "LOCK_NAME", "STAMP_NAME", "MARKER_NAME", "MANAGED_NAMES"]

LOCK_NAME = ".pellucid-batch.lock"
STAMP_NAME = ".pellucid-batch.json"
#: Name of the per-spectrum record written last: its presence means "done".
MARKER_NAME = "result.json"
#: Top-level names a batch writes (files and folders) besides the stamp and the lock.
MANAGED_NAMES = ("recipe.json", "recipes", "summary.csv", "summary.json", "report.pdf",
                 "spectra")
_REPORT_RE = re.compile(r"^report-.+\.pdf$")
_SAFE = re.compile(r"[^A-Za-z0-9._-]+")
_MAX_STEM = 80
_DISK_FULL = {errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC), errno.EROFS}


class OutputFolderError(PellucidError, ValueError):
    """The output folder cannot be used: another batch holds it, or it holds user files."""


def is_disk_full(exc: BaseException) -> bool:
    """True for 'no space left', 'quota exceeded' and 'read-only file system'."""
    return isinstance(exc, OSError) and exc.errno in _DISK_FULL


# ---------------------------------------------------------------------------------
# Names
def safe_stem(path) -> str:
    """A file stem reduced to letters, digits, '.', '_' and '-' (never empty, never dots)."""
    stem = _SAFE.sub("_", Path(path).stem).strip("._-")[:_MAX_STEM].strip("._-")
    return stem or "spectrum"


def export_stem(path) -> str:
    """The prefix of a spectrum's export files: its stem, unless that cannot be a file
    name prefix (separators, control characters, only dots, a leading dot, too long),
    then :func:`safe_stem`."""
    stem = Path(path).stem
    if (not stem or stem.startswith(".") or len(stem) > 120
            or any(c in stem for c in "/\\\x00") or any(ord(c) < 32 for c in stem)):
        return safe_stem(path)
    return stem


def assign_folders(paths: Iterable, shas: Iterable[str]) -> list[str]:
    """``spectra/<safe stem>-<sha256[:10]>`` per input, made unique (case-insensitively).

    The same input list always gives the same folders, so ``--resume`` finds them.
    """
    used: set[str] = set()
    out = []
    for p, sha in zip(paths, shas):
        base = f"{safe_stem(p)}-{(sha or '')[:10] or 'unreadable'}"
        name, n = base, 1
        while name.lower() in used:
            n += 1
            name = f"{base}-{n}"
        used.add(name.lower())
        out.append(f"spectra/{name}")
    return out


# ---------------------------------------------------------------------------------
# Ownership
def _sha_file(path: Path) -> str | None:
    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                h.update(chunk)
    except OSError:
        return None
    return h.hexdigest()


def _read_stamp(out_dir: Path) -> dict | None:
    try:
        d = json.loads((out_dir / STAMP_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return d if isinstance(d, dict) and d.get("format") == "pellucid-batch-folder" else None


def _legacy_batch_folder(out_dir: Path) -> bool:
    """A folder written by a Pellucid batch before stamps existed."""
    try:
        d = json.loads((out_dir / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(d, dict) and d.get("format") == "pellucid-batch-summary"


def check_out_dir(out_dir: Path, input_paths: Iterable[Path] = (),
                  input_folders: Iterable[Path] = ()) -> None:
    """Refuse an output folder whose files a batch must not replace (see the module docstring).

    Raises
    ------
    OutputFolderError
        Naming the file or folder and what to do.
    """
    out_dir = Path(out_dir)
    res = out_dir.resolve()
    for folder in input_folders:
        if Path(folder).resolve() == res:
            raise OutputFolderError(
                f"--out {out_dir} is the folder of the input spectra; the results need a "
                f"folder of their own, e.g. {out_dir / 'results'}")
    for p in input_paths:
        rp = Path(p).resolve()
        if rp.parent == res:
            raise OutputFolderError(
                f"--out {out_dir} holds the input spectrum {Path(p).name}; the results need "
                f"a folder of their own, e.g. {out_dir / 'results'}")
        for managed in ("spectra", "recipes"):
            if rp.is_relative_to(res / managed):
                raise OutputFolderError(
                    f"the input {p} lies inside {out_dir / managed}, where the batch writes "
                    f"its results; move the spectra or choose another --out folder")
    if not out_dir.is_dir():
        return
    present = [n for n in MANAGED_NAMES if (out_dir / n).exists()]
    present += sorted(p.name for p in out_dir.glob("report-*.pdf") if _REPORT_RE.match(p.name))
    if not present:
        return
    stamp = _read_stamp(out_dir)
    if stamp is None:
        if _legacy_batch_folder(out_dir):
            return
        raise OutputFolderError(
            f"--out {out_dir} already holds {present[0]}, which a batch would replace, and "
            f"the folder was not written by a Pellucid batch; choose a new or empty folder "
            f"(or move {present[0]} away)")
    written = stamp.get("files") if isinstance(stamp.get("files"), dict) else {}
    for name in present:
        p = out_dir / name
        if p.is_dir():
            if name not in written and name + "/" not in written:
                raise OutputFolderError(
                    f"--out {out_dir}: the folder {name}/ was not made by a Pellucid batch; "
                    f"choose another output folder or move it away")
            continue
        if name not in written or _sha_file(p) != written[name]:
            raise OutputFolderError(
                f"--out {out_dir}: {name} is not the file an earlier batch wrote there (it "
                f"was replaced or edited since); move it away or choose another folder, so "
                f"that it is not overwritten")


def write_stamp(out_dir: Path, files: Mapping[str, str | None], **info) -> None:
    """Record (merge) the files this batch wrote, by name -> SHA-256 (None: a folder)."""
    old = _read_stamp(out_dir) or {}
    known = dict(old.get("files") or {}) if isinstance(old.get("files"), dict) else {}
    for name, sha in files.items():
        known[name if sha is not None else name.rstrip("/") + "/"] = sha
    doc = {"format": "pellucid-batch-folder", "version": 1,
           "software": f"pellucid {__version__}",
           "updated_utc": datetime.now(UTC).isoformat(timespec="seconds"),
           **info, "files": known}
    atomic_write_json(out_dir / STAMP_NAME, doc)


# ---------------------------------------------------------------------------------
# One batch per folder
class FolderLock:
    """An operating-system lock on ``<folder>/.pellucid-batch.lock``.

    Held while the batch runs; the kernel releases it when the process ends, even
    after SIGKILL or a power cut, so a lock never goes stale. The file's text
    (process, host, start time) is only for the message to a second batch.
    """

    def __init__(self, folder: Path):
        self.folder = Path(folder)
        self.path = self.folder / LOCK_NAME
        self.fd: int | None = None

    def acquire(self) -> FolderLock:
        me = {"pid": os.getpid(), "host": socket.gethostname(),
              "started_utc": datetime.now(UTC).isoformat(timespec="seconds")}
        for _ in range(20):
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                _lock(fd)
            except OSError:
                info = _read_lock_text(fd)
                os.close(fd)
                who = (f"process {info['pid']} on {info.get('host', '?')}, started "
                       f"{info.get('started_utc', '?')}" if isinstance(info.get("pid"), int)
                       else "it left no details")
                raise OutputFolderError(
                    f"{self.folder}: another batch is writing to this folder ({who}); wait "
                    f"for it to end or choose another output folder") from None
            # The file we locked must still be the lock file: a batch that just ended
            # removes it, and our lock on the removed file would guard nothing.
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(self.path))
            except FileNotFoundError:
                same = False
            if not same:
                os.close(fd)
                continue
            os.ftruncate(fd, 0)
            os.lseek(fd, 0, os.SEEK_SET)
            os.write(fd, json.dumps(me).encode())
            self.fd = fd
            return self
        raise OutputFolderError(f"{self.folder}: cannot take the batch lock {self.path}")

    def release(self) -> None:
        if self.fd is None:
            return
        if os.name != "nt":          # removed while still locked, so no one reuses it half-way
            try:
                self.path.unlink()
            except OSError:
                pass
        try:
            os.close(self.fd)
        finally:
            self.fd = None


def _lock(fd: int) -> None:
    if os.name == "nt":
        import msvcrt
        msvcrt.locking(fd, msvcrt.LK_NBLCK, 1)
    else:
        import fcntl
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)


def _read_lock_text(fd: int) -> dict:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        d = json.loads(os.read(fd, 4096).decode("utf-8", "replace") or "{}")
    except (OSError, ValueError):
        return {}
    return d if isinstance(d, dict) else {}


# ---------------------------------------------------------------------------------
# Markers
def read_marker_record(folder: Path) -> dict | None:
    """The parsed marker ``result.json`` of a spectrum folder, or None."""
    try:
        rec = json.loads((Path(folder) / MARKER_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return rec if isinstance(rec, dict) else None


# ---------------------------------------------------------------------------------
# Summary files
def _cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ""
    return str(v)


class _Hashing:
    """A text file wrapper that also hashes what is written (for the ownership stamp)."""

    def __init__(self, fh):
        self.fh, self.h = fh, hashlib.sha256()

    def write(self, text: str):
        self.h.update(text.encode("utf-8"))
        return self.fh.write(text)


def _write_pair(out_dir: Path, names, rows: Iterable[Mapping], columns, header) -> dict:
    """Stream summary.csv and summary.json at once (memory flat in the number of rows)."""
    csv_name, json_name = names
    counts: dict[str, int] = {}
    with atomic_writer(out_dir / csv_name) as fc, atomic_writer(out_dir / json_name) as fj:
        hc, hj = _Hashing(fc), _Hashing(fj)
        w = csv.writer(hc, lineterminator="\n")
        w.writerow(columns)
        head = {"format": "pellucid-batch-summary", "version": 1, **header,
                "updated_utc": datetime.now(UTC).isoformat(timespec="seconds"),
                "columns": list(columns)}
        hj.write(json.dumps(head, ensure_ascii=False, allow_nan=False)[:-1] + ', "rows": [')
        first = True
        for r in rows:
            w.writerow([_cell(r.get(c)) for c in columns])
            hj.write(("\n" if first else ",\n")
                     + json.dumps(json_safe(dict(r)), ensure_ascii=False, allow_nan=False))
            first = False
            s = str(r.get("status"))
            counts[s] = counts.get(s, 0) + 1
        hj.write("\n], \"counts\": " + json.dumps(counts) + "}\n")
    return {csv_name: hc.h.hexdigest(), json_name: hj.h.hexdigest()}


#: Pause before the n-th retry of a summary write is n times this (seconds).
RETRY_PAUSE_S = 1.0


def write_summary_files(out_dir: Path, rows_factory, columns, header, *, attempts: int = 3,
                        pause_s: float | None = None) -> tuple[dict, str]:
    """Write summary.csv and summary.json from ``rows_factory()`` (an iterable of rows,
    made anew for every attempt), retrying; never raises for a write failure.

    Returns
    -------
    (written, warning)
        ``{file name: sha256}`` of what was written and a warning text ("" if the
        files were written under their usual names).
    """
    last = None
    pause_s = RETRY_PAUSE_S if pause_s is None else pause_s
    for i in range(attempts):
        try:
            return _write_pair(out_dir, ("summary.csv", "summary.json"), rows_factory(),
                               columns, header), ""
        except OSError as e:
            last = e
            if is_disk_full(e):
                break
            time.sleep(pause_s * (i + 1))
    # Not the disk: typically summary.csv open in a spreadsheet that locks it (Windows).
    if last is not None and not is_disk_full(last):
        stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
        alt = (f"summary-{stamp}.csv", f"summary-{stamp}.json")
        try:
            written = _write_pair(out_dir, alt, rows_factory(), columns, header)
            return written, (f"summary.csv could not be replaced ({_why(last)}; is it open in "
                             f"another program?); the summary was written to {alt[0]} and "
                             f"{alt[1]} instead")
        except OSError as e:
            last = e
    full = is_disk_full(last)
    return {}, (f"the summary could not be written ({_why(last)})"
                + ("; the disk is full: free some space, then" if full else "; fix that, then")
                + " rerun the same command with --resume to write it: every finished "
                  "spectrum's result is kept in spectra/*/result.json")


def _why(e: BaseException | None) -> str:
    if e is None:
        return "unknown error"
    if isinstance(e, OSError):
        return f"{e.strerror or e}" + (f": {e.filename}" if e.filename else "")
    return str(e)
