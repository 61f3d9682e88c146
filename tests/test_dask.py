"""Scale-out (fitting/batch.py, scheduler=...): the same per-spectrum work on a Dask cluster.

A real two-process LocalCluster on loopback stands in for a lab's cluster.
"""

import json

import pytest
from dask import distributed

from batch_helpers import make_recipe, write_spectra
from fitting.batch import BatchInputError, run_batch


def _rows(out):
    rows = json.loads((out / "summary.json").read_text())["rows"]
    return [{k: v for k, v in r.items() if k not in ("finished_utc", "elapsed_s")}
            for r in rows]


def test_batch_on_a_local_dask_cluster_matches_the_local_run(tmp_path):
    write_spectra(tmp_path / "in", [420.0, 530.0, 640.0], seed=21, broken=False)
    (tmp_path / "in" / "empty.csv").write_bytes(b"")
    recipe = make_recipe()
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        steps = []
        summary = run_batch([tmp_path / "in"], recipe, tmp_path / "dask", report=False,
                            scheduler=cluster.scheduler_address, on_step=steps.append)
    assert summary.total == 4 and len(steps) == 4
    assert summary.counts == {"ok": 3, "failed": 0, "error": 1}
    local = run_batch([tmp_path / "in"], recipe, tmp_path / "local", jobs=1, report=False)
    assert local.counts == summary.counts
    assert _rows(tmp_path / "dask") == _rows(tmp_path / "local")
    for r in _rows(tmp_path / "dask"):
        if r["status"] == "ok":
            assert (tmp_path / "dask" / r["result_dir"] / "result.json").is_file()


def test_unreachable_scheduler_is_a_clear_error(tmp_path, monkeypatch):
    import fitting.batch
    monkeypatch.setattr(fitting.batch, "DASK_CONNECT_TIMEOUT_S", 2)
    write_spectra(tmp_path / "in", [500.0], seed=1)
    with pytest.raises(BatchInputError, match="cannot reach the Dask scheduler"):
        run_batch([tmp_path / "in"], make_recipe(), tmp_path / "o", report=False,
                  scheduler="tcp://127.0.0.1:9")
