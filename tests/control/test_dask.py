"""The benchmark on a Dask cluster: a real scheduler and worker on loopback give exactly the local numbers; a
scheduler that does not answer is a clear error within a bounded wait, with nothing written."""

import socket
import sys
import time

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.evaluation import BenchSettings, ControlSettings, MethodSpec, run_bench
from stimsteer.control.plants import LinearNetworkPlant, record_session
from stimsteer.sysid.exceptions import StimsteerError

import distributed  # the test extra installs it

_TIMING = ("fit_s", "predict_s", "control_s", "total_s", "predict_ms_per_window", "solve_ms_median", "solve_ms_p95",
           "solve_ms_max", "solve_ms_first", "warnings")


def _session(seed):
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((3, 3))
    A *= 0.7 / np.max(np.abs(np.linalg.eigvals(A)))
    plant = LinearNetworkPlant(A, rng.standard_normal((3, 2)), rng.standard_normal((2, 3)), process_noise_std=0.02,
                               measurement_noise_std=0.05, sample_rate_hz=100.0, seed=seed)
    session = record_session(plant, rng.uniform(-1, 1, (480, 2)), trials=[(i * 80, (i + 1) * 80) for i in range(6)])
    return session, plant


def _settings(**changes):
    return BenchSettings(**{**dict(methods=(MethodSpec("indirect", "arx", {"alphas": (1e-6, 1e-3)}),
                                            MethodSpec("direct", "lsq", {"alphas": (1e-6, 1e-3)})),
                                   past_steps=3, horizon_steps=5, n_splits=2, control=ControlSettings(n_steps=30),
                                   train_trials=(2,), noise_scales=(2.0,), horizons=(), max_windows=100),
                              **changes})


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.slow
def test_local_cluster_gives_exactly_the_local_numbers(seed):
    session, plant = _session(seed)
    st = _settings()
    local = run_bench(session, st, plant=plant, n_workers=1, progress=False)
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, protocol="tcp",
                                       host="127.0.0.1", dashboard_address=None)
    try:
        remote = run_bench(session, st, plant=plant, scheduler=cluster.scheduler_address, progress=False)
    finally:
        cluster.close()
    assert remote.provenance["execution"]["mode"] == "dask"
    assert remote.provenance["execution"]["scheduler"].startswith("tcp://127.0.0.1:")
    assert remote.provenance["versions"]["distributed"] == distributed.__version__
    for name in ("prediction", "control", "fits", "tasks", "comparison", "sweeps"):
        a, b = local.tables()[name], remote.tables()[name]
        if "metric" in a.columns:  # summaries of wall times legitimately differ
            a, b = (t[~t["metric"].isin(["fit_s", "predict_ms_per_window", "solve_ms_median"])] for t in (a, b))
        drop = [c for c in _TIMING if c in a.columns]
        pd.testing.assert_frame_equal(a.drop(columns=drop).reset_index(drop=True),
                                      b.drop(columns=drop).reset_index(drop=True), check_exact=True)
    assert local.splits == remote.splits


def test_a_scheduler_that_does_not_answer_is_a_clear_error_within_the_timeout(seed, tmp_path, monkeypatch):
    session, plant = _session(seed)
    address = f"tcp://127.0.0.1:{_free_port()}"
    monkeypatch.chdir(tmp_path)
    t0 = time.perf_counter()
    with pytest.raises(StimsteerError, match=f"could not reach a Dask scheduler at '{address}' within 1 s"):
        run_bench(session, _settings(scheduler_timeout_s=1.0), plant=plant, scheduler=address, progress=False)
    assert time.perf_counter() - t0 < 8.0  # 1 s wait plus connection set-up, far below an unbounded hang
    assert list(tmp_path.iterdir()) == []


def test_without_distributed_the_error_names_the_extra(seed, monkeypatch):
    session, plant = _session(seed)
    monkeypatch.setitem(sys.modules, "distributed", None)  # makes `import distributed` fail
    with pytest.raises(StimsteerError, match=r"pip install 'stimsteer\[dist\]'"):
        run_bench(session, _settings(), plant=plant, scheduler="tcp://127.0.0.1:1", progress=False)


def test_a_scheduler_without_workers_is_a_clear_error_within_the_timeout(seed, tmp_path, monkeypatch):
    session, plant = _session(seed)
    monkeypatch.chdir(tmp_path)
    cluster = distributed.LocalCluster(n_workers=0, processes=False, protocol="tcp", host="127.0.0.1",
                                       dashboard_address=None)
    try:
        t0 = time.perf_counter()
        with pytest.raises(StimsteerError, match="answered but no worker joined within 1 s"):
            run_bench(session, _settings(scheduler_timeout_s=1.0), plant=plant, scheduler=cluster.scheduler_address,
                      progress=False)
        assert time.perf_counter() - t0 < 8.0
    finally:
        cluster.close()
    assert list(tmp_path.iterdir()) == []
