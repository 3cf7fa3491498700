"""Pool workers follow the run that started them (control/evaluation/execute.py); the kill tests with real `bench`
processes are in tests/cli/test_interruption.py."""

import multiprocessing as mp
import os
import signal
from concurrent.futures import ProcessPoolExecutor

import pytest

from stimsteer.control.evaluation import execute


@pytest.mark.parametrize("method", ["fork", pytest.param("forkserver", marks=pytest.mark.slow),
                                    pytest.param("spawn", marks=pytest.mark.slow)])
def test_workers_of_every_start_method_run_their_tasks(method):
    # a worker forked by a forkserver has another parent: it must watch the run, not take itself for an orphan
    ctx = mp.get_context(method)
    with ProcessPoolExecutor(2, mp_context=ctx, initializer=execute._follow_parent, initargs=(os.getpid(),)) as pool:
        pids = [pool.submit(os.getpid).result(timeout=120) for _ in range(4)]
    assert os.getpid() not in pids


def test_a_worker_ignores_ctrl_c_and_ends_on_sigterm():
    ctx = mp.get_context("fork")
    with ProcessPoolExecutor(1, mp_context=ctx, initializer=execute._follow_parent, initargs=(os.getpid(),)) as pool:
        handlers = pool.submit(_handlers).result(timeout=120)
    assert handlers == (signal.SIG_DFL, signal.SIG_IGN)


def _handlers():
    return signal.getsignal(signal.SIGTERM), signal.getsignal(signal.SIGINT)


def test_a_process_that_is_gone_is_not_running():
    import subprocess
    import sys

    done = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    assert execute._running(os.getpid()) and not execute._running(int(done.stdout))
