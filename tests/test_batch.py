"""Batch runner (fitting/batch.py): independence, recovery of the truth, resume, stop.

Synthetic spectra come from tests/batch_helpers.py (Stack.RT, itself checked against
the tmm package in test_stack.py, plus seeded noise).
"""

import csv
import json
import threading

import numpy as np
import pytest

from batch_helpers import BROKEN, make_recipe, true_n, write_spectra
from fitting.batch import (MARKER_NAME, BatchInputError, expand_inputs, iter_batch, run_batch,
                           summary_columns)
from fitting.recipe import recipe_hash
from fitting.spectrum import sha256_of_file

THICKNESSES = np.linspace(350.0, 750.0, 27)


@pytest.fixture(scope="module")
def batch27(tmp_path_factory):
    """27 good spectra + 3 broken ones, run once with 2 worker processes."""
    root = tmp_path_factory.mktemp("batch27")
    truth = write_spectra(root / "in", THICKNESSES, seed=27, broken=True)
    recipe = make_recipe(limits={"film_thickness": {"target": 550, "tol": 100},
                                 "film_n@633": {"min": 1.9, "max": 2.2}})
    steps = []
    summary = run_batch([root / "in"], recipe, root / "out", jobs=2, on_step=steps.append,
                        report=False)
    return root, truth, recipe, steps, summary


def test_broken_files_are_reported_and_the_rest_recovered(batch27):
    root, truth, recipe, steps, summary = batch27
    assert summary.total == 30 and len(steps) == 30
    assert summary.counts == {"ok": 27, "failed": 0, "error": 3}
    assert summary.exit_code == 1                     # some failed
    rows = json.loads((root / "out" / "summary.json").read_text())["rows"]
    by_name = {r["file"].rsplit("/", 1)[-1]: r for r in rows}
    for name in BROKEN:
        r = by_name[name]
        assert r["status"] == "error"
        assert name in r["reason"]                    # the message names the file
    assert "empty" in by_name["empty.csv"]["reason"]
    assert "binary" in by_name["binary.dat"]["reason"]
    assert "text" in by_name["text_in_numbers.csv"]["reason"]
    assert "line" in by_name["text_in_numbers.csv"]["reason"]
    for name, d in truth.items():
        r = by_name[name]
        assert r["status"] == "ok", r["reason"]
        # Truth recovered: thickness within 1 %, n(633 nm) within 0.5 % of the Cauchy truth.
        assert r["film_thickness"] == pytest.approx(d, rel=0.01)
        assert r["film_n@633"] == pytest.approx(true_n(633.0), rel=0.005)
        assert 0 < r["film_thickness_sigma"] < 5
        assert 0.5 < r["redchi"] < 2                  # noise level known: χ²_red ≈ 1
        expected = "pass" if abs(d - 550) <= 100 else "fail"
        assert r["spec_film_thickness"] == expected
        assert r["spec_film_n@633"] == "pass"
        assert r["spec_pass"] == expected
        assert r["model"] == "cauchy"                 # the recipe's own film model
    assert all(by_name[name]["model"] is None for name in BROKEN)


def test_every_row_and_file_carries_provenance(batch27):
    root, truth, recipe, steps, summary = batch27
    rhash = recipe_hash(recipe)
    rows = json.loads((root / "out" / "summary.json").read_text())["rows"]
    for r in rows:
        assert r["recipe_hash"] == rhash and r["software_version"]
        assert r["finished_utc"].endswith("+00:00")
        if r["file"].endswith(".txt"):
            assert r["sha256"] == sha256_of_file(r["file"])
            folder = root / "out" / r["result_dir"]
            rec = json.loads((folder / MARKER_NAME).read_text())
            assert rec["recipe_hash"] == rhash and rec["input"]["sha256"] == r["sha256"]
            assert rec["row"] == r
            stem = folder.name.rsplit("-", 1)[0]
            assert sorted(rec["files"]) == sorted(
                [f"{stem}_nk_film.csv", f"{stem}_curves.csv", f"{stem}_result.json",
                 f"{stem}_report.txt"])
            assert not list(folder.glob("*.png"))     # "plots" not chosen in the recipe
            assert rhash in (folder / f"{stem}_curves.csv").read_text()
    doc = json.loads((root / "out" / "summary.json").read_text())
    assert doc["recipe_hash"] == rhash and doc["software"]["version"]
    assert json.loads((root / "out" / "recipe.json").read_text()) == recipe.to_dict()


def test_summary_csv_matches_summary_json(batch27):
    root, truth, recipe, steps, summary = batch27
    doc = json.loads((root / "out" / "summary.json").read_text())
    with open(root / "out" / "summary.csv", newline="") as fh:
        table = list(csv.DictReader(fh))
    assert list(table[0]) == summary_columns(recipe) == doc["columns"]
    assert [r["index"] for r in doc["rows"]] == list(range(30))       # input order
    for c, j in zip(table, doc["rows"]):
        assert c["status"] == j["status"] and c["file"] == j["file"]
        if j["film_thickness"] is not None:
            assert float(c["film_thickness"]) == j["film_thickness"]  # full precision
        else:
            assert c["film_thickness"] == ""


def test_report_pdf_is_written_at_the_end(tmp_path):
    write_spectra(tmp_path / "in", [450.0, 520.0], seed=4, broken=True)
    summary = run_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=1)
    assert summary.report_error == ""
    assert summary.report_pdf == tmp_path / "out" / "report.pdf"
    assert summary.report_pdf.read_bytes()[:5] == b"%PDF-"


def test_resume_skips_done_spectra_and_refits_changed_ones(batch27, tmp_path):
    root, truth, recipe, steps, summary = batch27
    import shutil
    out = tmp_path / "out"
    shutil.copytree(root / "out", out)
    before = json.loads((out / "summary.json").read_text())["rows"]
    # Change one input file: only it is fitted again.
    changed = root / "in" / "s005.txt"
    saved = changed.read_bytes()
    try:
        write_spectra(tmp_path / "other", [612.0], seed=5)
        changed.write_bytes((tmp_path / "other" / "s000.txt").read_bytes())
        again = list(iter_batch([root / "in"], recipe, out, jobs=1, resume=True, report=False))
    finally:
        changed.write_bytes(saved)
    fitted = [s for s in again if not s.skipped]
    assert [s.path.name for s in fitted] == ["s005.txt"]
    assert fitted[0].row["film_thickness"] == pytest.approx(612.0, rel=0.01)
    after = json.loads((out / "summary.json").read_text())["rows"]
    assert [r for r in after if "s005" not in r["file"]] == \
        [r for r in before if "s005" not in r["file"]]
    # Another recipe (different hash) does not reuse the markers.
    other = make_recipe(name="another name")
    steps2 = list(iter_batch([root / "in" / "s000.txt"], other, out, jobs=1, resume=True,
                             report=False))
    assert [s.skipped for s in steps2] == [False]


def test_resume_refits_a_spectrum_whose_files_a_power_cut_emptied(batch27, tmp_path):
    # Spectra are written without fsync (fitting.atomic.deferred_sync); after a power
    # cut a file may come back empty although its marker is there. The marker's
    # SHA-256 of each file tells; only that spectrum is fitted again.
    root, truth, recipe, steps, summary = batch27
    import shutil
    out = tmp_path / "out"
    shutil.copytree(root / "out", out)
    marker = next(p for p in (out / "spectra").glob(f"*/{MARKER_NAME}")
                  if json.loads(p.read_text())["input"]["path"].endswith("s003.txt"))
    rec = json.loads(marker.read_text())
    assert rec["version"] == 3 and set(rec["files_sha256"]) == set(rec["files"]) != set()
    victim = marker.parent / rec["files"][0]
    victim.write_bytes(b"")
    again = list(iter_batch([root / "in"], recipe, out, jobs=1, resume=True, report=False))
    assert [s.path.name for s in again if not s.skipped] == ["s003.txt"]
    rec = json.loads(marker.read_text())        # written again, and recorded again
    assert victim.stat().st_size > 0
    assert rec["files_sha256"][victim.name] == sha256_of_file(victim)


def test_spectra_files_are_not_fsynced_one_by_one_but_written_back(tmp_path, monkeypatch):
    import os

    from fitting.atomic import can_defer_sync
    if not can_defer_sync():
        pytest.skip("no sync(2) here: every write is fsynced")
    write_spectra(tmp_path / "in", [480.0, 520.0, 560.0], seed=8)
    fsyncs, syncs = [], []
    real = os.fsync
    monkeypatch.setattr(os, "fsync", lambda fd: (fsyncs.append(fd), real(fd))[1])
    monkeypatch.setattr(os, "sync", lambda: syncs.append(1))
    counts = []
    for n in (1, 3):
        fsyncs.clear()
        run_batch(sorted((tmp_path / "in").iterdir())[:n], make_recipe(),
                  tmp_path / f"out{n}", jobs=1, report=False)
        counts.append(len(fsyncs))
    # The summary, recipe and stamp are fsynced; the spectra's 4 files each are not.
    assert counts[0] == counts[1]
    assert len(syncs) >= 2                      # written back before each summary


def test_stop_ends_the_batch_between_spectra(tmp_path):
    write_spectra(tmp_path / "in", [400, 450, 500, 550, 600, 650], seed=3)
    stop = threading.Event()
    seen = []
    gen = iter_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=1, stop=stop,
                     report=False)
    for step in gen:
        seen.append(step)
        if len(seen) == 2:
            stop.set()
    assert len(seen) == 2
    rows = json.loads((tmp_path / "out" / "summary.json").read_text())["rows"]
    assert len(rows) == 2
    markers = list((tmp_path / "out" / "spectra").glob(f"*/{MARKER_NAME}"))
    assert len(markers) == 2
    summary = run_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=1,
                        resume=True, report=False)
    assert summary.counts["ok"] == 6 and summary.exit_code == 0 and not summary.stopped


def test_stop_with_worker_processes_keeps_what_finished(tmp_path):
    write_spectra(tmp_path / "in", np.linspace(400, 700, 10), seed=10)
    stop = threading.Event()
    seen = []
    for step in iter_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=2,
                           stop=stop, report=False):
        seen.append(step)
        stop.set()
    assert 1 <= len(seen) < 10            # the spectra running at the stop may finish
    rows = json.loads((tmp_path / "out" / "summary.json").read_text())["rows"]
    assert len(rows) == len(seen)


def test_a_crashed_worker_process_does_not_stop_the_batch(tmp_path):
    import multiprocessing
    import os
    import signal
    write_spectra(tmp_path / "in", np.linspace(400, 700, 8), seed=8)
    steps, killed = [], []
    for step in iter_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=2,
                           report=False):
        steps.append(step)
        if not killed:
            # Kill one pool worker (SIGKILL) while others are queued or running.
            child = multiprocessing.active_children()[0]
            os.kill(child.pid, signal.SIGKILL)
            killed.append(child.pid)
    assert killed
    rows = json.loads((tmp_path / "out" / "summary.json").read_text())["rows"]
    assert len(rows) == 8
    assert [r["status"] for r in rows] == ["ok"] * 8     # in-flight ones were rerun


def test_rerun_with_another_recipe_leaves_no_stale_exports(tmp_path):
    write_spectra(tmp_path / "in", [480.0], seed=6)
    run_batch([tmp_path / "in"], make_recipe(exports=("nk", "curves", "report")),
              tmp_path / "out", jobs=1, report=False)
    (folder,) = (tmp_path / "out" / "spectra").iterdir()
    assert (folder / "s000_report.txt").is_file()
    run_batch([tmp_path / "in"], make_recipe(exports=("curves",)), tmp_path / "out", jobs=1,
              report=False)
    assert sorted(p.name for p in folder.iterdir()) == [MARKER_NAME, "s000_curves.csv"]


def test_one_batch_per_output_folder(tmp_path):
    import socket
    import subprocess
    import sys
    from fitting.batch import LOCK_NAME
    write_spectra(tmp_path / "in", [450.0, 500.0], seed=7)
    first = iter_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=1,
                       report=False)
    next(first)                                        # running, holds the lock
    with pytest.raises(BatchInputError, match="another batch"):
        next(iter_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=1))
    first.close()                                      # released when it ends
    assert not (tmp_path / "out" / LOCK_NAME).exists()
    # A lock left by a killed run (its process is gone) is taken over.
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True).stdout.strip()
    (tmp_path / "out" / LOCK_NAME).write_text(json.dumps(
        {"pid": int(dead), "host": socket.gethostname()}))
    summary = run_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=1,
                        report=False)
    assert summary.counts["ok"] == 2 and not (tmp_path / "out" / LOCK_NAME).exists()


def test_expand_inputs(tmp_path):
    write_spectra(tmp_path / "a", [400, 500], seed=1)
    (tmp_path / "a" / "recipe.json").write_text("{}")       # not a spectrum: skipped
    (tmp_path / "a" / ".hidden.csv").write_text("x")
    write_spectra(tmp_path / "b", [600], seed=2)
    out = tmp_path / "a" / "results"
    out.mkdir()
    (out / "summary.csv").write_text("x")
    got = expand_inputs([tmp_path / "a", str(tmp_path / "b" / "*.txt"),
                         tmp_path / "a" / "s000.txt", out / "summary.csv"], exclude=out)
    assert [p.name for p in got] == ["s000.txt", "s001.txt", "s000.txt"]
    assert got[2].parent.name == "b"
    with pytest.raises(BatchInputError, match="no such file"):
        expand_inputs([tmp_path / "missing.csv"])
    with pytest.raises(BatchInputError, match="matches no file"):
        expand_inputs([str(tmp_path / "*.nothing")])
    (tmp_path / "empty").mkdir()
    with pytest.raises(BatchInputError, match="no spectrum files"):
        expand_inputs([tmp_path / "empty"])


def test_failed_fit_and_internal_error_are_recorded_not_raised(tmp_path, monkeypatch):
    import dataclasses
    import fitting.fit
    real = fitting.fit.fit_spectrum
    calls = []

    def flaky(spectrum, stack, options=None, **kw):
        calls.append(spectrum.name)
        if len(calls) == 1:
            res = real(spectrum, stack, options, **kw)
            return dataclasses.replace(res, success=False, message="did not converge (test)")
        if len(calls) == 2:
            raise RuntimeError("simulated bug")
        return real(spectrum, stack, options, **kw)

    monkeypatch.setattr(fitting.fit, "fit_spectrum", flaky)
    write_spectra(tmp_path / "in", [500.0, 550.0, 600.0], seed=9)
    recipe = make_recipe(limits={"film_thickness": {"min": 0, "max": 1e4}})
    summary = run_batch([tmp_path / "in"], recipe, tmp_path / "out", jobs=1, report=False)
    rows = json.loads((tmp_path / "out" / "summary.json").read_text())["rows"]
    assert [r["status"] for r in rows] == ["failed", "error", "ok"]
    assert rows[0]["reason"] == "did not converge (test)"
    assert rows[0]["film_thickness"] is not None           # best values are still shown
    assert rows[0]["spec_pass"] == "n/a" and rows[2]["spec_pass"] == "pass"
    assert "internal error" in rows[1]["reason"] and "simulated bug" in rows[1]["reason"]
    rec = json.loads((tmp_path / "out" / rows[1]["result_dir"] / MARKER_NAME).read_text())
    assert "RuntimeError" in rec["traceback"]
    assert summary.counts == {"ok": 1, "failed": 1, "error": 1} and summary.exit_code == 1


def test_exit_codes():
    from fitting.batch import BatchSummary
    mk = lambda ok, total, stopped=False: BatchSummary(  # noqa: E731
        total, {"ok": ok}, None, None, None, "", 0.0, stopped)
    assert mk(3, 3).exit_code == 0
    assert mk(2, 3).exit_code == 1
    assert mk(0, 3).exit_code == 2
    assert mk(2, 3, stopped=True).exit_code == 1
    # Verdicts of the fit engine: all fitted but some to check -> 3; failures outrank it.
    judged = lambda ok, total, v, **kw: BatchSummary(  # noqa: E731
        total, {"ok": ok}, None, None, None, "", 0.0, verdicts=v, **kw)
    assert judged(3, 3, {"good": 3}).exit_code == 0
    assert judged(3, 3, {"good": 2, "check": 1}).exit_code == 3
    assert judged(3, 3, {"good": 2, "poor": 1}).exit_code == 3
    assert judged(2, 3, {"check": 2}).exit_code == 1
    assert judged(3, 3, {"good": 3}, halted="disk full").exit_code == 1
    assert judged(0, 0, {}).exit_code == 2


def test_batch_output_opens_as_a_project(batch27, tmp_path):
    from fitting.project import load_project, project_from_batch, save_project
    root, truth, recipe, steps, summary = batch27
    proj = project_from_batch(root / "out")
    assert proj.recipe.to_dict() == recipe.to_dict()
    assert len(proj.results) == 30
    assert len(proj.spectra) == 30              # broken files too: their bytes have a hash
    assert proj.check_spectra() == []
    back = load_project(save_project(proj, tmp_path / "p.pellucid.json"))
    assert back.results == proj.results


# -- issue: the overnight batch keeps its promises ------------------------------------------
def test_a_failed_summary_write_is_a_warning_and_the_rows_are_kept(tmp_path, monkeypatch):
    import errno
    import fitting.batch_files as bf
    real = bf._write_pair
    monkeypatch.setattr(bf, "RETRY_PAUSE_S", 0.0)

    def locked(out_dir, names, *a, **kw):            # summary.csv open in a spreadsheet
        if names[0] == "summary.csv":
            raise PermissionError(errno.EACCES, "Permission denied", str(out_dir / names[0]))
        return real(out_dir, names, *a, **kw)

    monkeypatch.setattr(bf, "_write_pair", locked)
    write_spectra(tmp_path / "in", [450.0, 520.0], seed=31)
    summary = run_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=1,
                        report=False)
    assert summary.counts["ok"] == 2 and summary.exit_code == 0     # the results stand
    (warning,) = summary.warnings
    assert "could not be replaced" in warning and "instead" in warning
    (alt,) = (tmp_path / "out").glob("summary-*.csv")
    assert alt.name in warning and len(alt.read_text().splitlines()) == 3

    def full(out_dir, names, *a, **kw):
        raise OSError(errno.ENOSPC, "No space left on device", str(out_dir / names[0]))

    monkeypatch.setattr(bf, "_write_pair", full)
    summary = run_batch([tmp_path / "in"], make_recipe(), tmp_path / "out2", jobs=1,
                        report=False)
    assert summary.counts["ok"] == 2
    (warning,) = summary.warnings
    assert "disk is full" in warning and "--resume" in warning
    assert len(list((tmp_path / "out2" / "spectra").glob(f"*/{MARKER_NAME}"))) == 2


def test_a_full_disk_during_the_exports_stops_the_batch_resumably(tmp_path, monkeypatch):
    import errno
    import fitting.export
    real = fitting.export.export_result
    calls = []

    def disk_fills(result, out_dir, **kw):
        calls.append(1)
        if len(calls) == 2:
            raise OSError(errno.ENOSPC, "No space left on device",
                          str(out_dir / "x_curves.csv"))
        return real(result, out_dir, **kw)

    monkeypatch.setattr(fitting.export, "export_result", disk_fills)
    write_spectra(tmp_path / "in", [420.0, 480.0, 540.0, 600.0], seed=32)
    steps = []
    summary = run_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=1,
                        report=False, on_step=steps.append)
    assert [s.status for s in steps] == ["ok", "error"]         # nothing after the full disk
    assert "disk is full" in steps[1].reason and "x_curves.csv" in steps[1].reason
    assert "internal error" not in steps[1].reason
    assert "disk is full" in summary.halted and summary.exit_code == 1
    assert len(list((tmp_path / "out" / "spectra").glob(f"*/{MARKER_NAME}"))) == 1
    monkeypatch.setattr(fitting.export, "export_result", real)
    again = run_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=1,
                      resume=True, report=False)
    assert again.counts["ok"] == 4 and again.skipped == 1 and again.exit_code == 0


def test_tasks_carry_no_recipe_and_workers_get_it_without_notes(tmp_path, monkeypatch):
    import pickle
    import fitting.batch as B
    seen = []
    real = B.process_spectrum

    def spy(task, context=None, **kw):
        seen.append((task, context))
        return real(task, context, **kw)

    monkeypatch.setattr(B, "process_spectrum", spy)
    write_spectra(tmp_path / "in", [500.0, 560.0], seed=33)
    recipe = make_recipe(notes="a long free-text note " * 200)
    run_batch([tmp_path / "in"], recipe, tmp_path / "out", jobs=1, report=False)
    for task, context in seen:
        assert set(task) == {"index", "path", "sha256", "folder", "recipe"}
        assert len(pickle.dumps(task)) < 600               # no recipe inside
        (info,) = context["recipes"].values()
        assert "notes" not in info["recipe"] and info["recipe"]["stack"]


def test_the_user_s_files_in_the_output_folder_are_never_replaced(tmp_path):
    write_spectra(tmp_path / "in", [500.0], seed=34)
    for name in ("recipe.json", "summary.csv"):
        out = tmp_path / f"out_{name}"
        out.mkdir()
        (out / name).write_text("my own file\n")
        with pytest.raises(BatchInputError, match=f"already holds {name}") as ei:
            run_batch([tmp_path / "in"], make_recipe(), out, jobs=1, report=False)
        assert "new or empty folder" in str(ei.value)
        assert (out / name).read_text() == "my own file\n"
        assert not (out / "spectra").exists()
    # The input folder itself is not a results folder (it gave "0 spectra" before).
    with pytest.raises(BatchInputError, match="folder of the input spectra"):
        run_batch([tmp_path / "in"], make_recipe(), tmp_path / "in", jobs=1, report=False)
    assert sorted(p.name for p in (tmp_path / "in").iterdir()) == ["s000.txt"]
    # An earlier batch's folder is reused, but not once the user edited its summary.
    run_batch([tmp_path / "in"], make_recipe(), tmp_path / "mine", jobs=1, report=False)
    run_batch([tmp_path / "in"], make_recipe(), tmp_path / "mine", jobs=1, report=False)
    edited = (tmp_path / "mine" / "summary.csv").read_text() + "my note\n"
    (tmp_path / "mine" / "summary.csv").write_text(edited)
    with pytest.raises(BatchInputError, match="summary.csv is not the file"):
        run_batch([tmp_path / "in"], make_recipe(), tmp_path / "mine", jobs=1, report=False)
    assert (tmp_path / "mine" / "summary.csv").read_text() == edited


def test_names_that_clash_or_are_odd_keep_their_own_folders(tmp_path):
    src = tmp_path / "in"
    write_spectra(src, [470.0], seed=35)
    data = (src / "s000.txt").read_bytes()
    (src / "s000.txt").unlink()
    names = ["a b.csv", "a_b.csv", "...csv", "a\\b.csv", "A_B.csv"]
    for name in names:                    # equal content: equal SHA-256 as well
        (src / name).write_bytes(data)
    # "...csv" starts with a dot: hidden, so only taken when named explicitly.
    inputs = [src, src / "...csv"]
    summary = run_batch(inputs, make_recipe(), tmp_path / "out", jobs=1, report=False)
    assert summary.counts == {"ok": 5, "failed": 0, "error": 0}
    rows = json.loads((tmp_path / "out" / "summary.json").read_text())["rows"]
    folders = [r["result_dir"] for r in rows]
    assert len({f.lower() for f in folders}) == 5              # none shares a folder
    for r in rows:
        folder = tmp_path / "out" / r["result_dir"]
        rec = json.loads((folder / MARKER_NAME).read_text())
        assert rec["input"]["path"] == r["file"]
        assert sorted(rec["files"]) == sorted(p.name for p in folder.iterdir()
                                              if p.name != MARKER_NAME)
        assert len(rec["files"]) == 4
    # The same input list finds the same folders again.
    again = run_batch(inputs, make_recipe(), tmp_path / "out", jobs=1, resume=True,
                      report=False)
    assert again.skipped == 5


def test_an_empty_or_stale_lock_file_is_no_obstacle(tmp_path):
    from fitting.batch import LOCK_NAME
    write_spectra(tmp_path / "in", [500.0], seed=36)
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / LOCK_NAME).write_text("")          # left empty by a crash
    summary = run_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=1,
                        report=False)
    assert summary.counts["ok"] == 1 and not (tmp_path / "out" / LOCK_NAME).exists()


def test_resume_ignores_start_values_but_not_the_model(tmp_path):
    # One interactive fit that moved the start values must not make --resume refit all.
    write_spectra(tmp_path / "in", [460.0, 540.0], seed=37)
    first = make_recipe()
    run_batch([tmp_path / "in"], first, tmp_path / "out", jobs=1, report=False)
    moved = first.to_dict()
    moved["stack"]["layers"][0]["thickness"]["value"] = 470.0
    moved["stack"]["layers"][0]["material"]["params"]["A"]["value"] = 2.2
    moved["name"] = "after an interactive fit"
    from fitting.recipe import recipe_from_dict
    again = run_batch([tmp_path / "in"], recipe_from_dict(moved), tmp_path / "out", jobs=1,
                      resume=True, report=False)
    assert again.skipped == 2 and again.counts["ok"] == 2
    rows = json.loads((tmp_path / "out" / "summary.json").read_text())["rows"]
    assert {r["recipe_hash"] for r in rows} == {recipe_hash(first)}   # who made them
    bounds = first.to_dict()
    bounds["stack"]["layers"][0]["thickness"]["max"] = 4000.0
    third = run_batch([tmp_path / "in"], recipe_from_dict(bounds), tmp_path / "out", jobs=1,
                      resume=True, report=False)
    assert third.skipped == 0 and third.counts["ok"] == 2


def _counts_files(folder, thicknesses, seed):
    """Raw detector signals: sample S = T (B - D) + D with a lamp-shaped 100 % line B and a
    flat dark D (the usual single-beam arithmetic, common practice), plus count noise."""
    from batch_helpers import WAVELENGTHS, true_stack
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    wl = WAVELENGTHS
    B = 2.0e5 * np.exp(-((wl - 650.0) / 400.0) ** 2) + 5.0e4
    D = np.full(wl.size, 800.0)

    def write(name, values):
        lines = ["wavelength_nm,counts"] + [f"{w:.2f},{v:.1f}" for w, v in zip(wl, values)]
        (folder / name).write_text("\n".join(lines) + "\n")

    for i, d in enumerate(thicknesses):
        T = true_stack(d).transmittance(wl)
        write(f"raw{i}.csv", T * (B - D) + D + rng.normal(0, 60.0, wl.size))
    return B, D, write


def test_a_recipe_s_100_percent_line_and_dark_are_applied_and_recorded(tmp_path):
    import hashlib
    from fitting.recipe import load_recipe, save_recipe
    B, D, write = _counts_files(tmp_path / "in", [480.0, 610.0], seed=38)
    refs = tmp_path / "recipes" / "refs"
    refs.mkdir(parents=True)
    _, _, write_ref = _counts_files(refs, [], seed=0)
    write_ref("baseline.csv", B)
    write_ref("dark.csv", D)
    path = save_recipe(make_recipe(reference={"baseline": "refs/baseline.csv",
                                              "dark": "refs/dark.csv"}),
                       tmp_path / "recipes" / "line.json")
    recipe = load_recipe(path)                    # relative paths: from the recipe's folder
    summary = run_batch([tmp_path / "in"], recipe, tmp_path / "out", jobs=1, report=False)
    assert summary.counts["ok"] == 2, summary
    rows = json.loads((tmp_path / "out" / "summary.json").read_text())["rows"]
    assert [r["film_thickness"] for r in rows] == pytest.approx([480.0, 610.0], rel=0.01)
    sha_b = hashlib.sha256((refs / "baseline.csv").read_bytes()).hexdigest()
    sha_d = hashlib.sha256((refs / "dark.csv").read_bytes()).hexdigest()
    folder = tmp_path / "out" / rows[0]["result_dir"]
    rec = json.loads((folder / MARKER_NAME).read_text())
    assert rec["reference"]["baseline"] == {"file": str((refs / "baseline.csv").resolve()),
                                            "sha256": sha_b}
    assert rec["reference"]["dark"]["sha256"] == sha_d
    curves = (folder / "raw0_curves.csv").read_text()
    assert f"# reference_baseline: {(refs / 'baseline.csv').resolve()} (sha256 {sha_b})" in curves
    # The copy beside the results names the files absolutely, so it works from there.
    saved = json.loads((tmp_path / "out" / "recipe.json").read_text())
    assert saved["reference"]["baseline"] == str((refs / "baseline.csv").resolve())
    # A new 100 % line is a new identity: --resume refits.
    write_ref("baseline.csv", B * 1.01)
    again = run_batch([tmp_path / "in"], load_recipe(path), tmp_path / "out", jobs=1,
                      resume=True, report=False)
    assert again.skipped == 0
    # A missing reference file stops the batch before it starts, naming the file.
    (refs / "dark.csv").unlink()
    with pytest.raises(BatchInputError, match="dark.csv.*does not exist"):
        run_batch([tmp_path / "in"], load_recipe(path), tmp_path / "out2", jobs=1)


def test_several_recipes_in_one_batch_from_a_manifest(tmp_path):
    from fitting.batch import read_manifest
    from fitting.dispersion import Cauchy
    from fitting.recipe import Recipe, save_recipe
    from fitting.stack import Layer, Stack
    from fitting.substrates import library_substrate
    write_spectra(tmp_path / "line3", [450.0, 520.0], seed=39)
    write_spectra(tmp_path / "line4", [600.0], seed=40)
    save_recipe(make_recipe(name="line 3"), tmp_path / "line3.json")
    coat = Stack([Layer("coat", Cauchy(2.0, 0.02), 560.0)], library_substrate("fused_silica", 1.0))
    save_recipe(Recipe(coat, name="line 4", exports=("curves",)), tmp_path / "line4.json")
    (tmp_path / "manifest.csv").write_text("# overnight run\nfile,recipe\n"
                                           "line3/*.txt,line3.json\nline4/,line4.json\n")
    items = read_manifest(tmp_path / "manifest.csv")
    assert len(items) == 2
    summary = run_batch(items, None, tmp_path / "out", jobs=1)
    assert summary.counts["ok"] == 3 and len(summary.report_pdfs) == 2
    for pdf in summary.report_pdfs:
        assert pdf.read_bytes()[:5] == b"%PDF-"
    doc = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert {"film_thickness", "coat_thickness", "recipe_name"} <= set(doc["columns"])
    by = {r["file"].rsplit("/", 1)[-1] + r["recipe_name"]: r for r in doc["rows"]}
    assert by["s000.txtline 3"]["film_thickness"] == pytest.approx(450.0, rel=0.01)
    assert by["s000.txtline 4"]["coat_thickness"] == pytest.approx(600.0, rel=0.01)
    assert by["s000.txtline 4"].get("film_thickness") is None
    assert len(list((tmp_path / "out" / "recipes").glob("*.json"))) == 2
    assert not (tmp_path / "out" / "recipe.json").exists()
    (tmp_path / "bad.csv").write_text("file,recipe\nline3/*.txt,missing.json\n")
    with pytest.raises(BatchInputError, match=r"bad.csv, line 2: .*missing.json"):
        read_manifest(tmp_path / "bad.csv")
    (tmp_path / "bad2.csv").write_text("spectrum,recipe\nx,y\n")
    with pytest.raises(BatchInputError, match="line 1: the header must name"):
        read_manifest(tmp_path / "bad2.csv")


def test_a_spreadsheet_in_the_folder_gets_a_row_and_other_files_a_note(tmp_path):
    write_spectra(tmp_path / "in", [500.0], seed=41)
    (tmp_path / "in" / "results.xlsx").write_bytes(b"PK\x03\x04" + bytes(64))
    (tmp_path / "in" / "notes.md").write_text("measured on Tuesday\n")
    summary = run_batch([tmp_path / "in"], make_recipe(), tmp_path / "out", jobs=1,
                        report=False)
    assert summary.counts == {"ok": 1, "failed": 0, "error": 1}
    rows = json.loads((tmp_path / "out" / "summary.json").read_text())["rows"]
    sheet = next(r for r in rows if r["file"].endswith("results.xlsx"))
    assert sheet["status"] == "error" and "save the sheet as CSV" in sheet["reason"]
    assert [p.name for p in summary.ignored] == ["notes.md"]


def test_per_spectrum_work_does_not_grow_with_the_batch(tmp_path, monkeypatch):
    # Nothing is rewritten or re-read per spectrum: the summary is written once and every
    # marker is read a fixed number of times, however many spectra there are.
    import fitting.batch as B
    import fitting.batch_files as bf
    writes, reads = [], []
    real_write, real_read = bf.write_summary_files, B.read_marker_record
    monkeypatch.setattr(B, "write_summary_files",
                        lambda *a, **k: writes.append(1) or real_write(*a, **k))
    monkeypatch.setattr(B, "read_marker_record",
                        lambda *a, **k: reads.append(1) or real_read(*a, **k))
    per = {}
    for n in (2, 6):
        writes.clear()
        reads.clear()
        write_spectra(tmp_path / f"in{n}", np.linspace(450, 600, n), seed=n)
        run_batch([tmp_path / f"in{n}"], make_recipe(), tmp_path / f"out{n}", jobs=1,
                  report=False)
        per[n] = (len(writes), len(reads) / n)
    assert per[2][0] == per[6][0] == 1
    assert per[2][1] == per[6][1] <= 2


def test_a_recipe_asking_for_a_model_suggestion_keeps_the_chosen_model(tmp_path):
    # One transparent Cauchy film: the candidates are the transparent families
    # (fitting.suggest.FAMILIES); each row names the chosen model and why.
    from fitting.suggest import FAMILIES
    truth = write_spectra(tmp_path / "in", [520.0], seed=5)
    recipe = make_recipe(suggest_model=True, exports=("json",))
    summary = run_batch([tmp_path / "in"], recipe, tmp_path / "out", jobs=1, report=False)
    assert summary.counts.get("ok") == 1
    doc = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert doc["columns"] == summary_columns(recipe) and "model_reason" in doc["columns"]
    row = doc["rows"][0]
    assert row["model"] in FAMILIES["transparent"]
    assert row["model_reason"].startswith(("Cauchy", "Sellmeier"))
    assert row["film_thickness"] == pytest.approx(truth["s000.txt"], rel=0.01)
    folder = tmp_path / "out" / row["result_dir"]
    result = json.loads((folder / "s000_result.json").read_text())
    ranking = result["extra"]["model_suggestion"]
    assert ranking["chosen"] == row["model"] and ranking["reason"] == row["model_reason"]
    assert {c["model"] for c in ranking["candidates"]} == set(FAMILIES["transparent"])


def test_a_spectrum_is_read_once_and_its_marker_laid_out_one_line_per_key(tmp_path,
                                                                          monkeypatch):
    # The bytes whose SHA-256 is checked are the bytes fitted: one read of the file.
    import builtins
    import hashlib
    import io
    from fitting.batch import process_spectrum, recipe_identity
    from fitting.jsonsafe import json_text
    write_spectra(tmp_path / "in", [520.0], seed=3)
    path = tmp_path / "in" / "s000.txt"
    recipe = make_recipe(exports=("json",))
    sha = hashlib.sha256(path.read_bytes()).hexdigest()
    context = {"out_dir": str(tmp_path / "out"), "run_id": "r1",
               "recipes": {"0": {"recipe": recipe.resolved().to_dict(),
                                 "hash": recipe_hash(recipe), "identity": recipe_identity(recipe),
                                 "reference_sha256": {}}}}
    opened = []
    real_open = io.open

    def counting_open(file, *a, **k):
        if str(file) == str(path):
            opened.append(file)
        return real_open(file, *a, **k)
    monkeypatch.setattr(builtins, "open", counting_open)
    monkeypatch.setattr(io, "open", counting_open)
    row = process_spectrum({"index": 0, "path": str(path), "sha256": sha,
                            "folder": "spectra/s000", "recipe": "0"}, context)
    monkeypatch.undo()
    assert row["status"] == "ok" and len(opened) == 1
    text = (tmp_path / "out" / "spectra" / "s000" / MARKER_NAME).read_text(encoding="utf-8")
    rec = json.loads(text)
    assert rec["input"]["sha256"] == rec["result"]["spectrum"]["sha256"] == sha
    assert text == json_text(rec) and text.count("\n") > 20     # readable, not one line


def test_the_model_column_is_the_model_of_each_shape(monkeypatch):
    # result_model remembers the choice per model shape; it must give what
    # presets.model_choice_of says for every menu model, whatever the fitted values.
    from types import SimpleNamespace
    from fitting.batch import result_model
    from fitting.presets import MODEL_CHOICES, make_model, model_choice_of
    import fitting.batch as B
    monkeypatch.setattr(B, "_MODEL_OF_SHAPE", {})
    models = [make_model(key) for key in MODEL_CHOICES if key not in ("tabulated", "roughness")]
    kinds = {model_choice_of(m) for m in models}
    assert len(kinds) == 8
    for scale in (1.0, 1.1, 1.0):                          # the second and third: remembered
        for m in models:
            d = m.to_dict()
            for p in d["params"].values():
                p["value"] = p["value"] * scale if p["value"] else p["value"]
            res = SimpleNamespace(extra={}, stack={"layers": [
                {"name": "film", "thickness": {"vary": True}, "material": d}]})
            assert result_model(res) == model_choice_of(m), m.kind
    assert set(B._MODEL_OF_SHAPE.values()) == kinds
