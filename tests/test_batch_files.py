"""The batch output folder (fitting/batch_files.py): lock, ownership, names, summary files.

Behaviour through whole batches is in test_batch.py; here the pieces on their own.
"""

import json
import threading

import pytest

from fitting.batch_files import (LOCK_NAME, FolderLock, OutputFolderError, assign_folders,
                                 check_out_dir, export_stem, safe_stem, write_stamp,
                                 write_summary_files)


def test_folder_names_are_safe_unique_and_stable():
    paths = ["runs/a b.csv", "other/a_b.csv", "A_B.csv", "...csv", "x/a\\b.csv", "c.csv"]
    shas = ["1234567890abcdef"] * 5 + ["fedcba0987654321"]
    folders = assign_folders(paths, shas)
    assert folders[:3] == ["spectra/a_b-1234567890", "spectra/a_b-1234567890-2",
                           "spectra/A_B-1234567890-3"]          # case-insensitive file systems
    assert folders[3] == "spectra/spectrum-1234567890"          # nothing left of the stem
    assert folders[4] == "spectra/a_b-1234567890-4"
    assert folders[5] == "spectra/c-fedcba0987"
    assert assign_folders(paths, shas) == folders               # same list, same folders
    assert safe_stem("ü mlaut (2).CSV") == "mlaut_2"
    assert len(safe_stem("x" * 300 + ".csv")) == 80


@pytest.mark.parametrize("name,stem", [("sample 01.csv", "sample 01"), ("...csv", "spectrum"),
                                       ("a\\b.csv", "a_b"), (".hidden.csv", "hidden"),
                                       ("tab\there.csv", "tab_here")])
def test_export_stems_are_kept_unless_they_cannot_be_file_names(name, stem):
    assert export_stem(name) == stem


def test_out_dir_checks(tmp_path):
    inputs = tmp_path / "in"
    inputs.mkdir()
    (inputs / "s.csv").write_text("1,2\n")
    with pytest.raises(OutputFolderError, match="folder of the input spectra"):
        check_out_dir(inputs, [inputs / "s.csv"], [inputs])
    with pytest.raises(OutputFolderError, match="holds the input spectrum s.csv"):
        check_out_dir(inputs, [inputs / "s.csv"])
    out = tmp_path / "out"
    check_out_dir(out, [inputs / "s.csv"])                      # does not exist yet: fine
    out.mkdir()
    (out / "spectra").mkdir()                                   # a user's folder of that name
    with pytest.raises(OutputFolderError, match="already holds spectra"):
        check_out_dir(out)
    write_stamp(out, {"spectra": None, "summary.csv": "0" * 64})
    check_out_dir(out)                                          # stamped: ours
    (out / "summary.csv").write_text("edited\n")
    with pytest.raises(OutputFolderError, match="summary.csv is not the file"):
        check_out_dir(out)
    (out / "summary.csv").unlink()
    (out / "report-line3.pdf").write_bytes(b"%PDF-")
    with pytest.raises(OutputFolderError, match="report-line3.pdf"):
        check_out_dir(out)


def test_summary_files_are_streamed_and_strict(tmp_path):
    rows = [{"index": i, "status": "ok", "x": float(i) / 3, "bad": float("nan")}
            for i in range(5)]
    written, warning = write_summary_files(tmp_path, lambda: iter(rows),
                                           ["index", "status", "x", "bad"], {"total": 5})
    assert warning == "" and set(written) == {"summary.csv", "summary.json"}
    doc = json.loads((tmp_path / "summary.json").read_text())   # strict JSON: NaN is null
    assert doc["counts"] == {"ok": 5} and doc["total"] == 5
    assert [r["x"] for r in doc["rows"]] == [i / 3 for i in range(5)]
    assert doc["rows"][0]["bad"] is None
    lines = (tmp_path / "summary.csv").read_text().splitlines()
    assert lines[0] == "index,status,x,bad" and lines[2] == f"1,ok,{1 / 3!r},"
    import hashlib
    assert written["summary.csv"] == hashlib.sha256(
        (tmp_path / "summary.csv").read_bytes()).hexdigest()


def test_an_empty_lock_file_is_reused_and_a_held_one_is_reported(tmp_path):
    (tmp_path / LOCK_NAME).write_text("")
    first = FolderLock(tmp_path).acquire()
    with pytest.raises(OutputFolderError, match=r"another batch .*process \d+ on"):
        FolderLock(tmp_path).acquire()
    first.release()
    assert not (tmp_path / LOCK_NAME).exists()
    FolderLock(tmp_path).acquire().release()


def test_batches_racing_for_one_folder_never_both_hold_it(tmp_path):
    # The old lock (read pid, unlink stale, create) let two batches starting at the same
    # moment both proceed about once in 100 tries. Hammer the lock from threads, each
    # with its own open file as a second process would have, on a stale lock file.
    from fitting.batch_files import FolderLock, LOCK_NAME, OutputFolderError
    (tmp_path / LOCK_NAME).write_text(json.dumps({"pid": 999999999, "host": "x"}))
    holders, most, wins = [0], [0], [0]
    guard = threading.Lock()
    start = threading.Barrier(6)

    def contender():
        start.wait()
        for _ in range(60):
            try:
                lock = FolderLock(tmp_path).acquire()
            except OutputFolderError:
                continue
            with guard:
                holders[0] += 1
                most[0] = max(most[0], holders[0])
                wins[0] += 1
            with guard:
                holders[0] -= 1
            lock.release()

    threads = [threading.Thread(target=contender) for _ in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert most[0] == 1 and wins[0] >= 1


