"""Worker processes of the batch (fitting/pool.py): set up once, ended at once.

That workers end by themselves when the batch process is killed is checked end to
end in test_cli.py (test_workers_end_when_the_batch_process_is_killed).
"""

import os
import time
from concurrent.futures import wait


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
