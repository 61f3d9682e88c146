"""Atomic writes (fitting/atomic.py): the target is whole or untouched, no temp files left."""

import json
import os

import pytest

from fitting.atomic import (atomic_write_bytes, atomic_write_json, atomic_write_text,
                            atomic_writer, can_defer_sync, deferred_sync, flush_to_disk)


def test_text_bytes_and_json_round_trip(tmp_path):
    atomic_write_text(tmp_path / "a.txt", "κ = 0.01\n")
    assert (tmp_path / "a.txt").read_text(encoding="utf-8") == "κ = 0.01\n"
    atomic_write_bytes(tmp_path / "b.bin", b"\x00\xff")
    assert (tmp_path / "b.bin").read_bytes() == b"\x00\xff"
    atomic_write_json(tmp_path / "c.json", {"n": 1.5, "name": "film"})
    assert json.loads((tmp_path / "c.json").read_text(encoding="utf-8")) == {"n": 1.5,
                                                                               "name": "film"}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.txt", "b.bin", "c.json"]


def test_failed_write_keeps_old_content_and_leaves_no_temp(tmp_path):
    target = tmp_path / "s.json"
    atomic_write_json(target, {"ok": True})
    with pytest.raises(ValueError):
        atomic_write_json(target, {"bad": float("nan")})  # NaN is not JSON
    with pytest.raises(TypeError):
        atomic_write_bytes(target, "not bytes")
    assert json.loads(target.read_text()) == {"ok": True}
    assert [p.name for p in tmp_path.iterdir()] == ["s.json"]


@pytest.mark.skipif(os.name != "posix", reason="permission bits are POSIX")
def test_existing_mode_is_kept(tmp_path):
    target = tmp_path / "m.txt"
    target.write_text("old")
    os.chmod(target, 0o640)
    atomic_write_text(target, "new")
    assert target.read_text() == "new"
    assert target.stat().st_mode & 0o777 == 0o640


def _count_fsyncs(monkeypatch):
    calls = []
    real = os.fsync
    monkeypatch.setattr(os, "fsync", lambda fd: (calls.append(fd), real(fd))[1])
    return calls


@pytest.mark.skipif(not can_defer_sync(), reason="no sync(2) here: writes are never deferred")
def test_deferred_writes_skip_fsync_but_stay_whole_and_atomic(tmp_path, monkeypatch):
    calls = _count_fsyncs(monkeypatch)
    atomic_write_text(tmp_path / "a.txt", "one\n")
    assert len(calls) == 2                      # the file and its directory
    calls.clear()
    with deferred_sync():
        atomic_write_text(tmp_path / "a.txt", "two\n")
        with atomic_writer(tmp_path / "b.csv") as fh:
            fh.write("x,y\n")
        with deferred_sync(False):              # a block can ask for fsync again
            atomic_write_text(tmp_path / "c.txt", "three\n")
    assert len(calls) == 2                      # only c.txt and its directory
    assert (tmp_path / "a.txt").read_text() == "two\n"
    assert (tmp_path / "b.csv").read_text() == "x,y\n"
    calls.clear()
    atomic_write_text(tmp_path / "a.txt", "four\n")     # after the block: fsync again
    assert len(calls) == 2
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.txt", "b.csv", "c.txt"]


def test_deferral_is_per_thread(tmp_path, monkeypatch):
    import threading
    calls = _count_fsyncs(monkeypatch)
    with deferred_sync():
        t = threading.Thread(target=atomic_write_text, args=(tmp_path / "t.txt", "x"))
        t.start()
        t.join()
    assert len(calls) == 2                      # the other thread was not deferred


@pytest.mark.skipif(not can_defer_sync(), reason="no sync(2) here")
def test_flush_to_disk_calls_sync(monkeypatch):
    calls = []
    monkeypatch.setattr(os, "sync", lambda: calls.append(1))
    flush_to_disk()
    assert calls == [1]
