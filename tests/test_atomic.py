"""Atomic writes (fitting/atomic.py): the target is whole or untouched, no temp files left."""

import json
import os

import pytest

from fitting.atomic import atomic_write_bytes, atomic_write_json, atomic_write_text


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
