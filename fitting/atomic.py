"""Atomic file writes: a reader sees either the old file or the whole new one.

Every save in Pellucid (recipes, projects, exports, batch summaries) goes through
these helpers so that a crash, a full disk or a killed process never leaves a
half-written file behind. The method is the usual POSIX one: write a temporary
file in the *same directory* (so the rename cannot cross file systems), flush and
``fsync`` it, then ``os.replace`` it over the target, which is atomic on POSIX and
on Windows (NTFS) alike. On POSIX the directory is fsynced too, so the rename
itself survives a power cut (common practice; see the ``rename(2)`` and
``fsync(2)`` manual pages).

Inside :func:`deferred_sync` the writes stay atomic (temporary file, then rename)
but skip the fsyncs: a killed process still leaves the old file or the whole new
one, and only a power cut or an OS crash before the kernel writes the data back
can lose what was written. The batch runner uses it for each spectrum's files and
makes up for it by checking every file against the SHA-256 its marker records
before it trusts an earlier run's result (see :mod:`fitting.batch`), and by one
:func:`flush_to_disk` now and then and at the end.

Functions
---------
atomic_write_bytes(path, data)
atomic_write_text(path, text, *, encoding="utf-8")
atomic_write_json(path, obj, *, indent=2)
atomic_writer(path, mode="w")     a context manager for files written piece by piece
deferred_sync()                   a context in which the writes above skip fsync
flush_to_disk()                   write back everything the OS holds (``sync(2)``)
"""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
from contextvars import ContextVar
from pathlib import Path

__all__ = ["atomic_write_bytes", "atomic_write_text", "atomic_write_json", "atomic_writer",
           "sync_dir", "deferred_sync", "flush_to_disk", "can_defer_sync"]

#: True inside :func:`deferred_sync` (per thread and per asyncio task).
_DEFERRED: ContextVar[bool] = ContextVar("pellucid_deferred_sync", default=False)


def can_defer_sync() -> bool:
    """Whether :func:`flush_to_disk` exists here (POSIX ``sync(2)``): only then may
    the fsyncs be left out, since only then can everything be written back later."""
    return hasattr(os, "sync")


@contextlib.contextmanager
def deferred_sync(enabled: bool = True):
    """Atomic writes in this block skip ``fsync`` (where :func:`can_defer_sync`).

    Each fsync waits for the disk, 2-4 ms on an ordinary SSD, while the CPU has
    nothing to do: the batch runner writes 4 files per spectrum, 6-8 fsyncs in
    all, which made about a tenth of each worker's time idle. The writes remain
    atomic against a killed process (the rename happens after the data are in
    the OS's cache, which a killed process does not lose); against a power cut
    the caller must check what it reads back (the batch compares each file with
    the SHA-256 recorded in the spectrum's marker) and call :func:`flush_to_disk`
    at the points that must be durable.
    """
    token = _DEFERRED.set(bool(enabled) and can_defer_sync())
    try:
        yield
    finally:
        _DEFERRED.reset(token)


def flush_to_disk() -> None:
    """Write back every file the OS holds in its cache (``sync(2)``; POSIX only).

    One call makes all writes done in :func:`deferred_sync` blocks durable at
    once. Where there is no ``sync`` (Windows) writes are never deferred, so
    there is nothing to do.
    """
    if can_defer_sync():
        os.sync()


def _fsync(fh) -> None:
    if not _DEFERRED.get():
        os.fsync(fh.fileno())


def _fsync_dir(directory: Path) -> None:
    # Makes the rename durable; not possible (nor needed) on Windows.
    if os.name != "posix" or _DEFERRED.get():
        return
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def atomic_write_bytes(path, data: bytes, *, sync_dir: bool = True) -> Path:
    """Write ``data`` to ``path`` atomically and return the path.

    Parameters
    ----------
    path : str or os.PathLike
        Target file. Its directory must exist.
    data : bytes
        The complete new content.

    Returns
    -------
    pathlib.Path
        ``path`` as a Path.

    sync_dir : bool
        Also fsync the directory, so the rename survives a power cut. A caller
        writing several files into one folder may pass False and call
        :func:`sync_dir` once at the end.

    Notes
    -----
    The temporary file is named ``.<name>.<random>.tmp`` in the target's
    directory and is removed if anything fails before the rename. An existing
    target keeps its permission bits.
    """
    path = Path(path)
    directory = path.parent if str(path.parent) else Path(".")
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=directory)
    tmp = Path(tmp_name)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            _fsync(fh)
        try:
            os.chmod(tmp, path.stat().st_mode & 0o7777)
        except FileNotFoundError:
            # mkstemp creates 0600; a new file gets the usual umask-based mode.
            umask = os.umask(0)
            os.umask(umask)
            os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    if sync_dir:
        _fsync_dir(directory)
    return path


def sync_dir(directory) -> None:
    """Make the renames done in ``directory`` durable (see ``sync_dir`` above)."""
    _fsync_dir(Path(directory))


def atomic_write_text(path, text: str, *, encoding: str = "utf-8",
                      sync_dir: bool = True) -> Path:
    """Write ``text`` to ``path`` atomically (UTF-8 by default, ``\\n`` line ends kept)."""
    return atomic_write_bytes(path, text.encode(encoding), sync_dir=sync_dir)


def atomic_write_json(path, obj, *, indent: int | None = 2) -> Path:
    """Serialise ``obj`` as JSON and write it atomically.

    NaN and infinity are refused (``allow_nan=False``) because they are not JSON
    and other tools would fail to read the file; convert them to ``None`` first.
    """
    text = json.dumps(obj, indent=indent, ensure_ascii=False, allow_nan=False)
    return atomic_write_text(path, text + "\n")


@contextlib.contextmanager
def atomic_writer(path, mode: str = "w", *, encoding: str = "utf-8"):
    """Write a file piece by piece; it appears (atomically) only if the block ends normally.

    For files too big to hold in memory first (a summary of many thousand rows).
    ``mode`` is ``"w"`` (text, ``\\n`` line ends kept) or ``"wb"``.

    Examples
    --------
    >>> with atomic_writer(tmp / "big.csv") as fh:      # doctest: +SKIP
    ...     for row in rows:
    ...         fh.write(row)
    """
    if mode not in ("w", "wb"):
        raise ValueError(f"mode must be 'w' or 'wb', got {mode!r}")
    path = Path(path)
    directory = path.parent if str(path.parent) else Path(".")
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=directory)
    tmp = Path(tmp_name)
    try:
        kw = {} if mode == "wb" else {"encoding": encoding, "newline": ""}
        with os.fdopen(fd, mode, **kw) as fh:
            yield fh
            fh.flush()
            _fsync(fh)
        try:
            os.chmod(tmp, path.stat().st_mode & 0o7777)
        except FileNotFoundError:
            umask = os.umask(0)
            os.umask(umask)
            os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(directory)
