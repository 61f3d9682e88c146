"""Worker processes of the batch (fitting/pool.py): set up once, ended at once.

That workers end by themselves when the batch process is killed is checked end to
end in test_cli.py (test_workers_end_when_the_batch_process_is_killed).
"""

import os
import subprocess
import sys
import time
from concurrent.futures import wait

import pytest

from fitting.pool import WorkerPool

_SETUP = []


def _setup(tag):
    _SETUP.append(tag)


def _setups(_):
    return os.getpid(), list(_SETUP)


def _sleep(seconds):
    time.sleep(seconds)
    return os.getpid()


def test_each_worker_is_set_up_once():
    with WorkerPool(2, initializer=_setup, initargs=("ctx",)) as pool:
        seen = dict(pool.map(_setups, range(12)))
    assert 1 <= len(seen) <= 2
    assert all(v == ["ctx"] for v in seen.values())       # once, however many tasks


def test_terminate_ends_running_workers_now():
    pool = WorkerPool(2)
    futures = [pool.submit(_sleep, 600) for _ in range(2)]
    deadline = time.monotonic() + 60
    while len(pool.worker_pids()) < 2:
        assert time.monotonic() < deadline, "workers did not start"
        time.sleep(0.05)
    pids = pool.worker_pids()
    pool.terminate()
    deadline = time.monotonic() + 60
    while [p for p in pids if _running(p)]:
        assert time.monotonic() < deadline, "terminated workers still run"
        time.sleep(0.05)
    # Waiting callers get an answer (a broken pool), they do not hang.
    done, _ = wait(futures, timeout=60)
    assert done == set(futures)


def _running(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:                           # a zombie is dead, only not yet reaped by its parent
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return True


_EARLY = """
import sys, time
from multiprocessing import forkserver
from fitting.pool import BATCH_PRELOAD, start_workers_early
server = forkserver._forkserver
assert not start_workers_early(1)                  # one job: no worker processes at all
assert server._forkserver_pid is None
assert start_workers_early(2)
pid = server._forkserver_pid
assert start_workers_early(2) and server._forkserver_pid == pid      # started once
# It returned without importing the fit engine here: the server does that.
assert "fitting.fit" not in sys.modules and "scipy" not in sys.modules
deadline = time.monotonic() + 60
while "forkserver" not in (cmdline := open(f"/proc/{pid}/cmdline", "rb").read().decode()):
    assert time.monotonic() < deadline, "the fork server did not start"
    time.sleep(0.02)                   # between its fork and its exec
assert all(m in cmdline for m in BATCH_PRELOAD), repr(cmdline)
print("ok")
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_start_workers_early_starts_the_preloading_server_and_returns():
    # A fresh interpreter: the fork server is one per process and tests share ours.
    out = subprocess.run([sys.executable, "-c", _EARLY], capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0 and out.stdout.strip() == "ok", out.stderr[-2000:]
