"""The pellucid command (fitting/cli.py): simulate, fit, batch, demo, gui, errors, kill/resume."""

import csv
import io
import json
import os
import signal
import subprocess
import sys
import time
import types
from pathlib import Path

import numpy as np
import pytest
import tmm

from batch_helpers import make_recipe, write_spectra
from fitting import cli
from fitting.batch import MARKER_NAME
from fitting.recipe import recipe_hash, save_recipe

ROOT = Path(__file__).resolve().parents[1]


def run(argv):
    out, err = io.StringIO(), io.StringIO()
    code = cli.main(argv, stdout=out, stderr=err)
    return code, out.getvalue(), err.getvalue()


def read_csv_block(text):
    lines = [ln for ln in text.splitlines() if not ln.startswith("#")]
    return list(csv.DictReader(lines))


@pytest.fixture
def recipe_file(tmp_path):
    return save_recipe(make_recipe(), tmp_path / "recipe.json")


def test_simulate_matches_the_stack_and_tmm(recipe_file):
    code, out, err = run(["simulate", str(recipe_file), "--range", "400:1000:2"])
    assert code == 0, err
    rows = read_csv_block(out)
    wl = np.array([float(r["wavelength_nm"]) for r in rows])
    T = np.array([float(r["T"]) for r in rows])
    R = np.array([float(r["R"]) for r in rows])
    assert wl[0] == 400 and wl[-1] == 1000 and wl.size == 301
    rhash = recipe_hash(make_recipe())
    assert f"# recipe_hash: {rhash}" in out and "# software: pellucid" in out
    stack = make_recipe().stack
    R_ref, T_ref = stack.RT(wl)
    np.testing.assert_allclose(T, T_ref, rtol=1e-9)
    np.testing.assert_allclose(R, R_ref, rtol=1e-9)
    # Independent reference: tmm.inc_tmm (S. J. Byrnes, arXiv:1603.02720), coherent film on
    # an incoherent 1 mm substrate, normal incidence, at 632 nm.
    i = int(np.argmin(abs(wl - 632.0)))
    Nf = stack.layers[0].material.N(wl[i:i + 1])[0]
    Ns = stack.substrate.N(wl[i:i + 1])[0]
    ref = tmm.inc_tmm("s", [1, Nf, Ns, 1], [np.inf, 500.0, 1e6, np.inf],
                      ["i", "c", "i", "i"], 0.0, wl[i])
    assert T[i] == pytest.approx(ref["T"], abs=1e-8)
    assert R[i] == pytest.approx(ref["R"], abs=1e-8)


def test_simulate_to_file_and_bad_ranges(recipe_file, tmp_path):
    code, out, err = run(["simulate", str(recipe_file), "--range", "500:600:50",
                          "--out", str(tmp_path / "sim.csv")])
    assert code == 0 and out == ""
    rows = read_csv_block((tmp_path / "sim.csv").read_text())
    assert [float(r["wavelength_nm"]) for r in rows] == [500, 550, 600]
    for bad in ("500:400:1", "500:600", "a:b:c", "0:600:1", "500:600:-1"):
        code, out, err = run(["simulate", str(recipe_file), "--range", bad])
        assert code == 2 and "--range" in err and "Traceback" not in err


def test_fit_one_spectrum_writes_exports(recipe_file, tmp_path):
    write_spectra(tmp_path / "in", [560.0], seed=11)
    code, out, err = run(["fit", str(tmp_path / "in" / "s000.txt"), "--recipe",
                          str(recipe_file), "--out", str(tmp_path / "res")])
    assert code == 0, err
    assert "[[Fit statistics]]" in out and "film_thickness" in out
    files = sorted(p.name for p in (tmp_path / "res").iterdir())
    assert files == ["s000_curves.csv", "s000_nk_film.csv", "s000_report.txt",
                     "s000_result.json"]
    doc = json.loads((tmp_path / "res" / "s000_result.json").read_text())
    assert doc["params"]["film_thickness"]["value"] == pytest.approx(560.0, rel=0.01)
    assert doc["provenance"]["recipe_hash"] == recipe_hash(make_recipe())


def test_fit_with_suggest_model_prints_the_ranking(recipe_file, tmp_path):
    write_spectra(tmp_path / "in", [560.0], seed=12)
    code, out, err = run(["fit", str(tmp_path / "in" / "s000.txt"), "--recipe",
                          str(recipe_file), "--out", str(tmp_path / "res"), "--suggest-model"])
    assert code in (0, 3), err
    assert "Model suggestion for layer 'film'" in out and "\nchosen: " in out
    for label in ("Cauchy (yours)", "Cauchy + Urbach tail", "Sellmeier"):
        assert label in out
    doc = json.loads((tmp_path / "res" / "s000_result.json").read_text())
    chosen = doc["extra"]["model_suggestion"]["chosen"]
    assert doc["provenance"]["recipe_hash"] == recipe_hash(
        make_recipe(suggest_model=True))                     # the recipe that was run
    assert chosen in ("cauchy", "cauchy_urbach", "sellmeier")
    # Without the flag (and without the recipe option) no ranking is printed.
    code, out, err = run(["fit", str(tmp_path / "in" / "s000.txt"), "--recipe",
                          str(recipe_file), "--out", str(tmp_path / "res2")])
    assert "Model suggestion" not in out


@pytest.mark.parametrize("edit,field", [
    (lambda d: d["stack"]["layers"][0]["material"].update(kind="plasma"),
     "stack.layers[0].material.kind"),
    (lambda d: d.update(version=99), "version"),
    (lambda d: d["stack"]["layers"][0]["thickness"].update(expr="__import__('os')"),
     "stack.layers[0].thickness.expr"),
])
def test_invalid_recipe_gives_one_line_error(tmp_path, edit, field):
    d = make_recipe().to_dict()
    edit(d)
    (tmp_path / "bad.json").write_text(json.dumps(d))
    write_spectra(tmp_path / "in", [500.0], seed=1)
    for argv in (["simulate", str(tmp_path / "bad.json"), "--range", "400:500:10"],
                 ["batch", str(tmp_path / "in"), "--recipe", str(tmp_path / "bad.json"),
                  "--out", str(tmp_path / "o")]):
        code, out, err = run(argv)
        assert code == 2
        assert f"field '{field}'" in err and "bad.json" in err
        assert "Traceback" not in err and err.count("\n") == 1


def test_batch_exit_status(tmp_path, recipe_file):
    write_spectra(tmp_path / "good", [450.0, 650.0], seed=2)
    write_spectra(tmp_path / "bad", [], broken=True)
    base = ["--recipe", str(recipe_file), "--jobs", "1", "--no-report"]
    code, out, err = run(["batch", str(tmp_path / "good"), "--out", str(tmp_path / "o1"), *base])
    assert code == 0 and "2 ok" in out
    assert "[2/2] ok" in err                        # plain log lines when not a terminal
    code, out, err = run(["batch", str(tmp_path / "good"), str(tmp_path / "bad" / "empty.csv"),
                          "--out", str(tmp_path / "o2"), *base])
    assert code == 1 and "1 errors" in out and "the file is empty" in err
    code, out, err = run(["batch", str(tmp_path / "bad"), "--out", str(tmp_path / "o3"), *base])
    assert code == 2 and "0 ok" in out
    code, out, err = run(["batch", str(tmp_path / "nowhere"), "--out", str(tmp_path / "o4"),
                          *base])
    assert code == 2 and "no such file or folder" in err
    code, out, err = run(["batch", str(tmp_path / "good"), "--out", str(tmp_path / "o5"),
                          "--recipe", str(recipe_file), "--jobs", "0"])
    assert code == 2                                 # argparse usage error


def test_batch_help_documents_exit_status(capsys):
    assert cli.main(["batch", "--help"]) == 0
    text = capsys.readouterr().out
    assert "exit status" in text and "--resume" in text and "--scheduler" in text
    for code in ("0 ", "1 ", "2 "):
        assert f"\n  {code}" in text


def test_progress_bar_on_a_terminal():
    from fitting.batch import BatchStep

    class Tty(io.StringIO):
        def isatty(self):
            return True

    s = Tty()
    bar = cli._Progress(s, 4, time.monotonic() - 2.0)
    for i in range(4):
        bar(BatchStep(i, 4, Path(f"s{i}.txt"), "ok", "", {"film_thickness": 500.0}, i + 1))
    text = s.getvalue()
    assert text.count("\r") == 4 and text.endswith("\n")
    assert "4/4" in text and "spectra/s" in text and "ETA" in text
    assert "\n" not in text[:-1]                      # one line, redrawn in place


def test_demo_without_demo_data_fails_clearly(tmp_path, monkeypatch):
    monkeypatch.setattr(cli, "demo_data_dir", lambda: tmp_path / "no_demo")
    code, out, err = run(["demo", "--out", str(tmp_path / "o")])
    assert code == 2 and "demo data are not installed" in err and "recipe.json" in err


def test_demo_runs_the_batch_on_demo_data(tmp_path, monkeypatch):
    demo = tmp_path / "demo_data"
    write_spectra(demo / "spectra", [480.0, 530.0], seed=8)
    save_recipe(make_recipe(), demo / "recipe.json")
    monkeypatch.setattr(cli, "demo_data_dir", lambda: demo)
    code, out, err = run(["demo", "--out", str(tmp_path / "o"), "--jobs", "1"])
    assert code == 0, err
    assert "2 ok" in out and "report:" in out
    assert (tmp_path / "o" / "report.pdf").is_file()


def test_demo_runs_every_set_with_its_own_recipe(tmp_path, monkeypatch):
    demo = tmp_path / "demo_data"
    write_spectra(demo / "spectra", [480.0], seed=8)
    save_recipe(make_recipe(), demo / "recipe.json")
    write_spectra(demo / "second" / "spectra", [510.0], seed=9)
    save_recipe(make_recipe(), demo / "second" / "recipe.json")
    (demo / "references").mkdir()          # a folder without a recipe is not a set
    monkeypatch.setattr(cli, "demo_data_dir", lambda: demo)
    code, out, err = run(["demo", "--out", str(tmp_path / "o"), "--jobs", "1"])
    assert code == 0, err
    assert out.count("1 ok") == 2
    assert (tmp_path / "o" / "report.pdf").is_file()
    assert (tmp_path / "o" / "second" / "report.pdf").is_file()
    assert not (tmp_path / "o" / "references").exists()


def test_gui_is_loaded_by_name(monkeypatch, tmp_path):
    calls = []
    fake = types.ModuleType("app.main")
    fake.main = lambda argv=None: calls.append(argv) or 0
    monkeypatch.setitem(sys.modules, "app.main", fake)
    monkeypatch.setenv("QT_QPA_PLATFORM", "offscreen")
    assert run(["gui", str(tmp_path / "p.json")])[0] == 0
    assert run([])[0] == 0
    assert run(["gui", "--theme", "dark"])[0] == 0     # the app's own options pass through
    assert calls == [[str(tmp_path / "p.json")], [], ["--theme", "dark"]]


def test_gui_errors_are_clear(monkeypatch):
    for var in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM"):
        monkeypatch.delenv(var, raising=False)
    if sys.platform.startswith("linux"):
        code, out, err = run(["gui"])
        assert code == 2 and "no display" in err
    monkeypatch.setenv("QT_QPA_PLATFORM", "offscreen")

    def no_qt(name):
        if name == "app.main":
            raise ModuleNotFoundError("No module named 'PySide6'", name="PySide6")
        return real_import(name)

    real_import = cli.importlib.import_module
    monkeypatch.setattr(cli.importlib, "import_module", no_qt)
    code, out, err = run(["gui"])
    assert code == 2 and "needs PySide6" in err and "Traceback" not in err
    # Qt present but a system library missing, found only when the app starts.
    fake = types.ModuleType("app.main")

    def qt_fails(argv=None):
        raise ImportError("libEGL.so.1: cannot open shared object file")

    fake.main = qt_fails
    monkeypatch.setattr(cli.importlib, "import_module",
                        lambda name: fake if name == "app.main" else real_import(name))
    code, out, err = run(["gui"])
    assert code == 2 and "libEGL" in err and "cannot start" in err


def test_no_traceback_for_missing_files(tmp_path, recipe_file):
    code, out, err = run(["fit", str(tmp_path / "nope.csv"), "--recipe", str(recipe_file),
                          "--out", str(tmp_path / "o")])
    assert code == 2 and "no such file" in err
    code, out, err = run(["simulate", str(tmp_path / "nope.json"), "--range", "400:500:1"])
    assert code == 2 and "file not found" in err


# ---------------------------------------------------------------------------------
def _cli(*args):
    return [sys.executable, "-m", "fitting.cli", *map(str, args)]


def test_the_command_exits_quickly_with_everything_written(tmp_path):
    # The command skips the interpreter's teardown (fitting.cli.run): its exit status
    # and every byte it printed must still arrive, also through a pipe, and atexit
    # handlers must still run.
    recipe = ROOT / "demo_data" / "recipe.json"
    ok = subprocess.run(_cli("simulate", recipe, "--range", "300:1100:0.5"), cwd=ROOT,
                        capture_output=True, text=True, timeout=120)
    assert ok.returncode == 0
    lines = ok.stdout.splitlines()
    assert lines[-1].startswith("1100") and sum(ln[:1].isdigit() for ln in lines) == 1601
    bad = subprocess.run(_cli("simulate", tmp_path / "nope.json", "--range", "400:500:1"),
                         cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and "file not found" in bad.stderr
    probe = tmp_path / "atexit.txt"
    code = ("import atexit, pathlib, sys; from fitting import cli; "
            f"atexit.register(pathlib.Path({str(probe)!r}).write_text, 'ran'); "
            "sys.argv = ['pellucid', 'simulate', 'nope.json', '--range', '1:2:1']; cli.run()")
    r = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True,
                       text=True, timeout=120)
    assert r.returncode == 2 and probe.read_text() == "ran"


def _rows(out_dir):
    rows = json.loads((out_dir / "summary.json").read_text())["rows"]
    drop = ("finished_utc", "elapsed_s")
    return {r["file"]: {k: v for k, v in r.items() if k not in drop} for r in rows}


#: Spectra in the batches these tests stop: enough that a batch cannot finish before
#: the signal lands (a small test spectrum takes about 0.05 s per worker).
STOPPED_BATCH = 40


def test_killed_batch_resumes_to_the_same_summary(tmp_path):
    n = STOPPED_BATCH
    write_spectra(tmp_path / "in", np.linspace(380, 720, n - 1), seed=16, broken=False)
    (tmp_path / "in" / "empty.csv").write_bytes(b"")
    recipe = save_recipe(make_recipe(limits={"film_thickness": {"min": 400, "max": 700}}),
                         tmp_path / "recipe.json")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    common = ["--recipe", recipe, "--jobs", 2, "--no-report"]

    # 1. Start, wait until a few spectra are done, then SIGKILL the whole process group.
    out = tmp_path / "killed"
    proc = subprocess.Popen(_cli("batch", tmp_path / "in", "--out", out, *common), env=env,
                            cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    deadline = time.monotonic() + 120
    try:
        while len(list(out.glob(f"spectra/*/{MARKER_NAME}"))) < 3:
            assert proc.poll() is None, "batch ended before it could be killed"
            assert time.monotonic() < deadline, "no spectrum finished within 120 s"
            time.sleep(0.01)
    finally:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
    done_at_kill = len(list(out.glob(f"spectra/*/{MARKER_NAME}")))
    assert 3 <= done_at_kill < n
    for marker in out.glob(f"spectra/*/{MARKER_NAME}"):
        json.loads(marker.read_text())                # every marker is whole
    # The summary is written when a batch ends; SIGKILL gives it no chance, the
    # markers hold every finished spectrum and --resume rebuilds the summary.
    assert not (out / "summary.json").exists()
    print(f"killed with {done_at_kill} of {n} spectra done")

    # 2. Resume; 3. an uninterrupted run for comparison.
    r = subprocess.run(_cli("batch", tmp_path / "in", "--out", out, "--resume", *common),
                       env=env, cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert r.returncode == 1, r.stderr                # one broken file
    assert r.stderr.count("skipped (done earlier") >= done_at_kill
    ref = tmp_path / "reference"
    r2 = subprocess.run(_cli("batch", tmp_path / "in", "--out", ref, *common), env=env,
                        cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert r2.returncode == 1, r2.stderr
    resumed, reference = _rows(out), _rows(ref)
    assert len(reference) == n
    assert resumed == reference                       # same rows, statuses and values
    assert not list(out.glob("**/.*.tmp"))            # no temp files left behind


def test_ctrl_c_keeps_finished_spectra(tmp_path):
    n = 2 * STOPPED_BATCH        # one job: twice as many to stay ahead of the signal
    write_spectra(tmp_path / "in", np.linspace(400, 700, n), seed=12)
    recipe = save_recipe(make_recipe(), tmp_path / "recipe.json")
    out = tmp_path / "out"
    # A shell starts background jobs with SIGINT ignored, and Python then leaves it
    # ignored: the test's own launcher must not decide whether Ctrl-C works.
    proc = subprocess.Popen(_cli("batch", tmp_path / "in", "--out", out, "--recipe", recipe,
                                 "--jobs", 1, "--no-report"),
                            env=dict(os.environ, PYTHONPATH=str(ROOT)), cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    deadline = time.monotonic() + 120
    while len(list(out.glob(f"spectra/*/{MARKER_NAME}"))) < 2:
        assert proc.poll() is None and time.monotonic() < deadline
        time.sleep(0.01)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "interrupted" in err and "--resume" in err and "Traceback" not in err
    markers = list(out.glob(f"spectra/*/{MARKER_NAME}"))
    assert 2 <= len(markers) < n
    assert len(_rows(out)) == len(markers)          # the summary lists every finished one


def _descendants(pid: int) -> set[int]:
    """Every live descendant of a process, from /proc (Linux)."""
    parent_of = {}
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                fields = (d / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if fields[0] != "Z":                      # a zombie is gone, only not reaped
                parent_of[int(d.name)] = int(fields[1])
    out, frontier = set(), {pid}
    while frontier:
        frontier = {c for c, p in parent_of.items() if p in frontier} - out
        out |= frontier
    return out


def _alive(pids) -> set[int]:
    gone = set()
    for pid in pids:
        try:
            state = (Path("/proc") / str(pid) / "stat").read_text().rsplit(")", 1)[1].split()[0]
        except OSError:
            gone.add(pid)
            continue
        if state == "Z":
            gone.add(pid)
    return set(pids) - gone


def _start_batch(tmp_path, n, out, *extra):
    write_spectra(tmp_path / "in", np.linspace(400, 700, n), seed=n)
    recipe = save_recipe(make_recipe(), tmp_path / "recipe.json")
    return subprocess.Popen(_cli("batch", tmp_path / "in", "--out", out, "--recipe", recipe,
                                 "--jobs", 2, "--no-report", *extra),
                            env=dict(os.environ, PYTHONPATH=str(ROOT)), cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)


def _wait_for_markers(proc, out, k):
    deadline = time.monotonic() + 120
    while len(list(out.glob(f"spectra/*/{MARKER_NAME}"))) < k:
        assert proc.poll() is None, "batch ended before it could be stopped"
        assert time.monotonic() < deadline, "no spectrum finished within 120 s"
        time.sleep(0.01)


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads /proc (Linux)")
def test_workers_end_when_the_batch_process_is_killed(tmp_path):
    # SIGKILL of the main process alone (an out-of-memory kill, kill -9 of the pid):
    # the workers used to run on for ever, writing into --out and holding stdout open.
    out = tmp_path / "out"
    proc = _start_batch(tmp_path, STOPPED_BATCH, out)
    try:
        _wait_for_markers(proc, out, 1)
        family = _descendants(proc.pid)
        assert len(family) >= 2                      # worker processes (and helpers)
        os.kill(proc.pid, signal.SIGKILL)
        # communicate() returns only when every holder of stdout/stderr is gone.
        proc.communicate(timeout=120)
        deadline = time.monotonic() + 60
        while _alive(family):
            assert time.monotonic() < deadline, f"still running: {_alive(family)}"
            time.sleep(0.05)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    done = len(list(out.glob(f"spectra/*/{MARKER_NAME}")))
    time.sleep(0.2)
    assert len(list(out.glob(f"spectra/*/{MARKER_NAME}"))) == done   # nothing writes on


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads /proc (Linux)")
def test_sigterm_stops_like_ctrl_c_and_resume_finishes(tmp_path):
    from fitting.batch import LOCK_NAME
    out = tmp_path / "out"
    n = STOPPED_BATCH
    proc = _start_batch(tmp_path, n, out)
    try:
        _wait_for_markers(proc, out, 2)
        family = _descendants(proc.pid)
        proc.send_signal(signal.SIGTERM)              # what a job scheduler sends
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert proc.returncode == 143, err
    assert "SIGTERM" in err and "--resume" in err and "Traceback" not in err
    assert not (out / LOCK_NAME).exists()
    # Workers were ended; helpers (fork server, resource tracker) follow the main process.
    deadline = time.monotonic() + 60
    while _alive(family):
        assert time.monotonic() < deadline, f"still running: {_alive(family)}"
        time.sleep(0.05)
    markers = list(out.glob(f"spectra/*/{MARKER_NAME}"))
    assert 2 <= len(markers) < n
    assert len(_rows(out)) == len(markers)           # the summary lists what finished
    r = subprocess.run(_cli("batch", tmp_path / "in", "--out", out, "--recipe",
                            tmp_path / "recipe.json", "--jobs", 2, "--no-report", "--resume"),
                       env=dict(os.environ, PYTHONPATH=str(ROOT)), cwd=ROOT,
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert len(_rows(out)) == n
    assert r.stderr.count("skipped (done earlier") == len(markers)


def test_simulate_never_overwrites_the_recipe_or_a_user_file(recipe_file, tmp_path):
    before = recipe_file.read_bytes()
    code, out, err = run(["simulate", str(recipe_file), "--range", "500:600:50",
                          "--out", str(recipe_file)])
    assert code == 2 and "recipe file itself" in err
    assert recipe_file.read_bytes() == before
    mine = tmp_path / "notes.csv"
    mine.write_text("wavelength,my data\n")
    code, out, err = run(["simulate", str(recipe_file), "--range", "500:600:50",
                          "--out", str(mine)])
    assert code == 2 and "not an earlier Pellucid simulation" in err
    assert mine.read_text() == "wavelength,my data\n"
    sim = tmp_path / "sim.csv"
    for _ in range(2):                                # an earlier simulation is replaced
        code, out, err = run(["simulate", str(recipe_file), "--range", "500:600:50",
                              "--out", str(sim)])
        assert code == 0, err


def test_a_recipe_that_would_kill_the_batch_is_refused_before_any_work(tmp_path):
    d = make_recipe().to_dict()
    text = json.dumps(d).replace('"time_limit_s": 60.0', '"time_limit_s": Infinity')
    (tmp_path / "r.json").write_text(text)
    write_spectra(tmp_path / "in", [500.0], seed=2)
    code, out, err = run(["batch", str(tmp_path / "in"), "--recipe", str(tmp_path / "r.json"),
                          "--out", str(tmp_path / "o")])
    assert code == 2 and "fit.options.time_limit_s" in err and "finite" in err
    assert not (tmp_path / "o").exists()


def test_scheduler_help_says_the_cluster_must_be_trusted(capsys):
    assert cli.main(["batch", "--help"]) == 0
    text = capsys.readouterr().out
    assert "pickle" in text and "control" in text


def _with_verdicts(monkeypatch, verdicts):
    """Give fits the fit engine's verdict attributes in turn (as the engine will)."""
    import fitting.fit
    real = fitting.fit.fit_spectrum
    it = iter(verdicts)

    def judged(*a, **kw):
        res = real(*a, **kw)
        v, why = next(it)
        object.__setattr__(res, "verdict", v)
        object.__setattr__(res, "verdict_reasons", why)
        return res

    monkeypatch.setattr(fitting.fit, "fit_spectrum", judged)


def test_fit_exit_code_follows_the_verdict(recipe_file, tmp_path, monkeypatch):
    write_spectra(tmp_path / "in", [560.0], seed=11)
    spectrum = str(tmp_path / "in" / "s000.txt")
    _with_verdicts(monkeypatch, [("good", ()), ("check", ("n at 633 nm is extrapolated",)),
                                 ("poor", ("structured residuals",))])
    codes = []
    for _ in range(3):
        code, out, err = run(["fit", spectrum, "--recipe", str(recipe_file),
                              "--out", str(tmp_path / "res")])
        codes.append(code)
    assert codes == [0, 3, 3]
    assert "verdict: poor" in out and "structured residuals" in out


def test_batch_exit_code_follows_the_verdicts(recipe_file, tmp_path, monkeypatch):
    write_spectra(tmp_path / "in", [450.0, 650.0], seed=2)
    base = ["--recipe", str(recipe_file), "--jobs", "1", "--no-report"]
    _with_verdicts(monkeypatch, [("good", ()), ("good", ()), ("good", ()),
                                 ("check", ("n at 633 nm is extrapolated",))])
    code, out, err = run(["batch", str(tmp_path / "in"), "--out", str(tmp_path / "o1"), *base])
    assert code == 0 and "2 good, 0 check, 0 poor" in out
    code, out, err = run(["batch", str(tmp_path / "in"), "--out", str(tmp_path / "o2"), *base])
    assert code == 3 and "1 fitted spectra need checking" in out
    assert "ok, check" in err                         # the progress line says so too
    with open(tmp_path / "o2" / "summary.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["verdict"] for r in rows] == ["good", "check"]
    assert rows[1]["verdict_reasons"] == "n at 633 nm is extrapolated"


def test_fit_applies_the_recipe_s_reference_files(tmp_path):
    from test_batch import _counts_files
    B, D, write = _counts_files(tmp_path / "in", [530.0], seed=5)
    write("baseline.csv", B)
    write("dark.csv", D)
    recipe = save_recipe(make_recipe(reference={"baseline": "in/baseline.csv",
                                                "dark": "in/dark.csv"}),
                         tmp_path / "recipe.json")
    code, out, err = run(["fit", str(tmp_path / "in" / "raw0.csv"), "--recipe", str(recipe),
                          "--out", str(tmp_path / "res")])
    assert code in (0, 3), err
    assert "after dividing by the 100 % line" in out
    doc = json.loads((tmp_path / "res" / "raw0_result.json").read_text())
    assert doc["params"]["film_thickness"]["value"] == pytest.approx(530.0, rel=0.01)
    assert "baseline.csv" in doc["provenance"]["reference_baseline"]


def test_batch_from_a_manifest_and_usage_errors(tmp_path):
    write_spectra(tmp_path / "a", [480.0], seed=3)
    save_recipe(make_recipe(), tmp_path / "r.json")
    (tmp_path / "m.csv").write_text("file;recipe\na/*.txt;r.json\n")    # semicolons too
    code, out, err = run(["batch", "--manifest", str(tmp_path / "m.csv"), "--out",
                          str(tmp_path / "o"), "--jobs", "1", "--no-report"])
    assert code == 0, err
    assert "1 spectra: 1 ok" in out
    code, out, err = run(["batch", "--out", str(tmp_path / "o2")])
    assert code == 2 and "--manifest" in err
    code, out, err = run(["batch", str(tmp_path / "a"), "--out", str(tmp_path / "o2")])
    assert code == 2 and "--recipe is needed" in err
