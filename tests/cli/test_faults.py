"""Fault injection (issue 12): full and read-only disks, concurrent runs on one output, killed benchmarks, and the
energy budget over rolling windows of what a closed loop actually applies.

Commands run as a user runs them (a child process each). The disk tests mount a tiny tmpfs (root only; skipped with
the reason otherwise); the in-process variant monkeypatches the final rename so it runs anywhere.

Every case failed when it was written (issue 12 measured each defect); all pass now, and none is marked.
"""

from __future__ import annotations

import errno
import importlib.util
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest


def _helpers():
    """tests/cli/conftest.py as a plain module (the import mode is importlib: a conftest is not on sys.path)."""
    name = "_stimsteer_cli_test_helpers"
    if name not in sys.modules:
        spec = importlib.util.spec_from_file_location(name, Path(__file__).with_name("conftest.py"))
        sys.modules[name] = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(sys.modules[name])
    return sys.modules[name]


_h = _helpers()
assert_one_clean_error_line, leftovers, run_cli, start_cli, tree_hash = (
    _h.assert_one_clean_error_line, _h.leftovers, _h.run_cli, _h.start_cli, _h.tree_hash)


# ---------------------------------------------------------------------------------------------------- disks
def _mount_tmpfs(where: Path, size="200k"):
    where.mkdir(parents=True, exist_ok=True)
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(where)], capture_output=True,
                          text=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here (needs root and mount permission): {done.stderr.strip()}")


def _umount(where: Path):
    subprocess.run(["umount", str(where)], capture_output=True)
    if os.path.ismount(where):
        subprocess.run(["umount", "-l", str(where)], capture_output=True)


@pytest.fixture
def full_disk(tmp_path):
    """A 200 KiB tmpfs filled to the last byte: every write of data fails with ENOSPC."""
    disk = tmp_path / "full"
    _mount_tmpfs(disk)
    try:
        fd = os.open(disk / "filler", os.O_WRONLY | os.O_CREAT, 0o644)
        try:
            while os.write(fd, b"\0" * 4096):
                pass
        except OSError as exc:
            assert exc.errno == errno.ENOSPC
        finally:
            os.close(fd)
        yield disk
    finally:
        _umount(disk)


@pytest.fixture
def read_only_disk(tmp_path):
    """A tmpfs remounted read-only (chmod does not stop root; a read-only mount does): EROFS on every write."""
    disk = tmp_path / "ro"
    _mount_tmpfs(disk)
    try:
        (disk / "existing.txt").write_text("kept\n")
        done = subprocess.run(["mount", "-o", "remount,ro", str(disk)], capture_output=True, text=True)
        if done.returncode != 0:
            pytest.skip(f"cannot remount a tmpfs read-only here: {done.stderr.strip()}")
        yield disk
    finally:
        _umount(disk)


def _pattern(d: Path) -> Path:
    path = d / "pattern.csv"
    path.write_text("time [s],in:stim_a [uA],in:stim_b [uA],in:stim_c [uA]\n"
                    + "".join(f"{k * 0.004:g},{1 if k < 3 else 0},0,0\n" for k in range(40)))
    return path


#: command -> (argv builder, output name); each writes into a folder given as ``disk``.
_WRITERS = {
    "fit": (lambda f, disk, tmp: ["fit", f["small"], "--route", "indirect", "--method", "arx", "--past-steps", 4,
                                  "--horizon-steps", 10, "--out", disk / "m.h5"], "m.h5"),
    "plan": (lambda f, disk, tmp: ["plan", f["arx"], "--target", "rec_01=20", "--limits", f["limits"],
                                   "--horizon-steps", 10, "--out", disk / "plan"], "plan"),
    "schedule": (lambda f, disk, tmp: ["schedule", "--limits", f["limits"], "--inputs", 3, "--order", 20, "--trials",
                                       4, "--trial-s", 2, "--rest-s", 0.5, "--rate-hz", 250, "--out", disk / "s.csv"],
                 "s.csv"),
    "network": (lambda f, disk, tmp: ["network", f["arx"], "--out", disk / "net"], "net"),
    "predict": (lambda f, disk, tmp: ["predict", f["arx"], "--pattern", _pattern(tmp), "--out", disk / "pred"],
                "pred"),
}

# When these tests were written (issue 12), every full or read-only disk gave "internal error", exit 1.
def _disk_params(kind):
    return [pytest.param(cmd, id=cmd) for cmd in _WRITERS]


def _assert_refused_by_the_disk(run, disk, out, reason):
    assert run.code not in (-11, 139), f"segfault\n{run}"
    line = assert_one_clean_error_line(run, 2)
    assert reason in line and str(disk) in line, str(run)
    assert not out.exists() and leftovers(out) == [], f"partial output: {sorted(os.listdir(disk))}\n{run}"


@pytest.mark.parametrize("command", _disk_params("full"))
def test_a_full_disk_is_one_line_naming_the_path_and_leaves_nothing(shipped, full_disk, tmp_path, command):
    build, name = _WRITERS[command]
    before = tree_hash(shipped["dir"])
    run = run_cli(*build(shipped, full_disk, tmp_path), cwd=tmp_path, timeout=120)
    _assert_refused_by_the_disk(run, full_disk, full_disk / name, "No space left on device")
    assert sorted(os.listdir(full_disk)) == ["filler"]
    assert tree_hash(shipped["dir"]) == before


@pytest.mark.parametrize("size", ["400k", "2m"])
def test_demo_on_a_small_disk_is_one_line_and_leaves_nothing(tmp_path, size):
    disk = tmp_path / "small"
    _mount_tmpfs(disk, size=size)
    try:
        run = run_cli("demo", "--out", disk / "demo", cwd=tmp_path, timeout=300)
        _assert_refused_by_the_disk(run, disk, disk / "demo", "No space left on device")
        assert os.listdir(disk) == []
    finally:
        _umount(disk)


@pytest.mark.parametrize("command", _disk_params("ro"))
def test_a_read_only_disk_is_one_line_naming_the_path_and_leaves_nothing(shipped, read_only_disk, tmp_path, command):
    build, name = _WRITERS[command]
    run = run_cli(*build(shipped, read_only_disk, tmp_path), cwd=tmp_path, timeout=120)
    _assert_refused_by_the_disk(run, read_only_disk, read_only_disk / name, "Read-only file system")
    assert sorted(os.listdir(read_only_disk)) == ["existing.txt"]


_RENAME_CASES = [(c, errno.ENOSPC) for c in _WRITERS] + [("plan", e) for e in (errno.EROFS, errno.EDQUOT, errno.EMFILE)]


@pytest.mark.parametrize("command, code", [
    pytest.param(c, e, id=f"{c}-{errno.errorcode[e]}")
    for c, e in _RENAME_CASES])
def test_an_os_error_at_the_final_rename_is_one_line_in_process(shipped, tmp_path, monkeypatch, capsys, command,
                                                                code):
    from stimsteer.control.cli import main

    def refuse(src, dst, *args, **kwargs):
        raise OSError(code, os.strerror(code), str(dst))

    build, name = _WRITERS[command]
    argv = [str(a) for a in build(shipped, tmp_path / "disk", tmp_path)]
    (tmp_path / "disk").mkdir()
    monkeypatch.delenv("STIMSTEER_DEBUG", raising=False)
    monkeypatch.setattr(os, "replace", refuse)
    result = main(argv)
    err = capsys.readouterr().err
    assert result == 2, err
    assert err.count("\n") == 1 and os.strerror(code) in err and str(tmp_path / "disk") in err, err
    out = tmp_path / "disk" / name
    assert not out.exists() and leftovers(out) == [], sorted(os.listdir(tmp_path / "disk"))


# ---------------------------------------------------------------------------------------------------- races
def test_three_concurrent_plans_on_one_folder_one_writes_the_others_are_refused(shipped, tmp_path):
    out = tmp_path / "plan"
    argv = ["plan", shipped["arx"], "--target", "rec_01=20", "--limits", shipped["limits"], "--horizon-steps", 10,
            "--out", out]
    procs = [start_cli(*argv, cwd=tmp_path) for _ in range(3)]
    runs = [(p.wait(timeout=120), *p.communicate()) for p in procs]
    codes = sorted(r[0] for r in runs)
    assert codes == [0, 2, 2], runs
    for code, stdout, stderr in runs:
        if code == 2:
            assert stderr.count("\n") == 1 and str(out) in stderr and "Traceback" not in stderr, stderr
            assert "wrote" not in stdout, stdout
    assert (out / "plan.json").is_file() and leftovers(out) == []


def _wait_for(condition, seconds: float):
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline and not condition():
        time.sleep(0.05)


def _slow_session(shipped, tmp_path):
    """The demo session four times over: long enough that a fit computes for several seconds."""
    from stimsteer.sysid import Session, load_session, save_session

    s = load_session(shipped["session"])
    T = s.u.shape[0]
    long = Session(u=np.tile(s.u, (4, 1)), y=np.tile(s.y, (4, 1)), sample_rate_hz=s.sample_rate_hz,
                   trials=[(a + k * T, b + k * T) for k in range(4) for a, b in s.trials],
                   input_names=s.input_names, output_names=s.output_names, input_units=s.input_units,
                   output_units=s.output_units)
    return save_session(long, tmp_path / "long.h5")


@pytest.mark.slow
def test_a_second_fit_on_the_same_model_file_is_refused_at_once(shipped, tmp_path):
    session, out = _slow_session(shipped, tmp_path), tmp_path / "same.h5"
    # ridge ARX with a 240-step past: ~23 s on an idle 2-core machine, most of it computing. The least-squares and
    # then the regularised Hankel predictor used here before became fast enough (3 s, then the closed form of issue
    # 14) that the second run, whose start-up alone takes up to 8 s on a loaded machine, started after the first had
    # finished; so did ridge ARX at 60 steps once its fit took 8 s.
    argv = ["fit", session, "--route", "indirect", "--method", "arx", "--past-steps", 240, "--horizon-steps", 60,
            "--out", out]
    first = start_cli(*argv, cwd=tmp_path)
    try:
        # the first is past its start-up: it has claimed its output (a hidden `.same.h5.*` beside it), or 4 s passed
        _wait_for(lambda: leftovers(out) or first.poll() is not None, 4.0)
        time.sleep(0.5)
        second = run_cli(*argv, cwd=tmp_path, timeout=300)
        first_not_done = not out.exists()  # refused while the first was computing, not because it had finished
        first_code = first.wait(timeout=300)
    finally:
        if first.poll() is None:
            first.kill()
    assert first_code == 0, first.communicate()[1]
    line = assert_one_clean_error_line(second, 2)
    assert str(out) in line, str(second)
    assert first_not_done, f"the second fit was refused only after the first saved (it computed)\n{second}"
    assert leftovers(out) == []


def _hold(pid: int) -> list[int]:
    """Stop a process and its descendants (SIGSTOP); the pids stopped."""
    held = []
    for p in [pid, *sorted(_descendants(pid))]:
        try:
            os.kill(p, signal.SIGSTOP)
            held.append(p)
        except ProcessLookupError:
            pass
    return held


def _release(held: list[int]) -> None:
    for p in held:
        try:
            os.kill(p, signal.SIGCONT)
        except ProcessLookupError:
            pass


def _bench_argv(shipped, out, *extra):
    return ["bench", shipped["small"], "--plant", shipped["small_plant"], "--out", out, "--seed", 1, *extra]


@pytest.mark.slow
def test_a_second_bench_on_the_same_folder_is_refused_before_computing(shipped, tmp_path):
    out = tmp_path / "report"
    first = start_cli(*_bench_argv(shipped, out, "--workers", 2), cwd=tmp_path)
    try:
        # its workers compute: they start after its claim on the folder (children before it, such as the `uname`
        # h5py runs at import, are not its workers; holding it there let the second run claim first: 1 failure in a
        # full run, 2026-12-05)
        claim = out.parent / f".{out.name}.claim"
        _wait_for(lambda: (claim.exists() and _descendants(first.pid)) or first.poll() is not None, 60.0)
        assert first.poll() is None, "the first bench ended too soon for this test"
        # held where it is (stopped) while the second runs: the first has claimed the folder and cannot finish
        # meanwhile, however fast the bench has become (it took 5 s here and ended before a second run started
        # on a busy machine: 1 failure in 5 full runs of a fresh clone)
        held = _hold(first.pid)
        try:
            second = run_cli(*_bench_argv(shipped, out, "--workers", 1, "--quick"), cwd=tmp_path, timeout=300)
            first_not_done = not out.exists()  # refused while the first was computing, not because it had finished
        finally:
            _release(held)
        assert first.wait(timeout=300) == 0, first.communicate()[1]
    finally:
        if first.poll() is None:
            first.kill()
            first.wait()
    line = assert_one_clean_error_line(second, 2)
    assert str(out) in line and first_not_done, f"refused only after computing ({second.seconds:.1f} s)\n{second}"


# ---------------------------------------------------------------------------------------------------- signals
def _proc_stat(pid: int):
    """(state, ppid, pgid) of a live process, or None."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except (OSError, IndexError):
        return None
    return fields[0], int(fields[1]), int(fields[2])


def _all_pids():
    return [int(p) for p in os.listdir("/proc") if p.isdigit()]


def _descendants(root: int) -> set[int]:
    found, frontier = set(), {root}
    while frontier:
        children = {pid for pid in _all_pids() if (_proc_stat(pid) or ("", -1, -1))[1] in frontier} - found
        found |= children
        frontier = children
    return found


def _survivors(pids, pgid) -> list[int]:
    """Live (not zombie) processes among ``pids`` or in process group ``pgid``."""
    alive = []
    for pid in set(pids) | {p for p in _all_pids() if (_proc_stat(p) or ("", -1, -1))[2] == pgid}:
        st = _proc_stat(pid)
        if st is not None and st[0] != "Z" and (pid in pids or st[2] == pgid):
            alive.append(pid)
    return sorted(alive)


def _start_bench_with_workers(shipped, out, cwd):
    """A bench with 2 local workers, in its own process group, once both workers run; its streams go to files
    (orphaned workers would hold a pipe open)."""
    logs = cwd / "bench_logs"
    logs.mkdir(exist_ok=True)
    proc = start_cli(*_bench_argv(shipped, out, "--workers", 2), cwd=cwd, start_new_session=True,
                     stdout=open(logs / "stdout", "w"), stderr=open(logs / "stderr", "w"))
    proc.log_dir = logs
    deadline, workers = time.monotonic() + 60, set()
    while time.monotonic() < deadline and proc.poll() is None:
        workers = _descendants(proc.pid)
        if len(workers) >= 2:
            time.sleep(1.0)  # the workers are computing
            return proc, workers | _descendants(proc.pid)
        time.sleep(0.1)
    proc.kill()
    pytest.fail(f"bench did not start 2 workers within 60 s (exit {proc.poll()}): "
                f"{(logs / 'stderr').read_text()[-2000:]}")


def _end_survivors(pids):
    """Kill (by id) what the test's own bench left alive, so a failing test does not leak processes."""
    for pid in pids:
        st = _proc_stat(pid)
        if st is not None and st[0] != "Z":
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass


def _wait_for_no_survivors(pids, pgid, seconds=10.0):
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if not _survivors(pids, pgid):
            return []
        time.sleep(0.2)
    return _survivors(pids, pgid)


@pytest.mark.slow
def test_kill_9_of_bench_leaves_no_worker_alive(shipped, tmp_path):
    out = tmp_path / "report"
    proc, workers = _start_bench_with_workers(shipped, out, tmp_path)
    try:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
        left = _wait_for_no_survivors(workers, proc.pid)
        assert left == [], f"processes of the killed bench alive 10 s after it died: {left}"
    finally:
        _end_survivors(workers)


@pytest.mark.slow
def test_sigterm_of_bench_stops_its_workers_and_removes_its_temporary_folder(shipped, tmp_path):
    out = tmp_path / "report"
    proc, workers = _start_bench_with_workers(shipped, out, tmp_path)
    try:
        os.kill(proc.pid, signal.SIGTERM)
        code = proc.wait(timeout=30)
        left = _wait_for_no_survivors(workers, proc.pid)
        err = (proc.log_dir / "stderr").read_text()
        assert code in (-signal.SIGTERM, 128 + signal.SIGTERM), f"exit {code}: {err[-2000:]}"
        assert "Traceback" not in err, err[-3000:]
        assert not out.exists() and leftovers(out) == [], sorted(os.listdir(tmp_path))
        assert left == [], f"processes of the stopped bench alive 10 s after it ended: {left}"
    finally:
        _end_survivors(workers)


def _dead_pid() -> int:
    done = subprocess.Popen([sys.executable, "-c", "pass"])
    done.wait()
    return done.pid


@pytest.mark.slow
def test_the_next_run_removes_or_names_what_a_killed_run_left(shipped, tmp_path):
    out = tmp_path / "report"
    stale = tmp_path / ".report.k1ll3d"
    stale.mkdir()
    (stale / "results.json").write_text('{"partial": tru')
    (tmp_path / ".report.claim").write_text(f"{_dead_pid()} 0")
    run = run_cli(*_bench_argv(shipped, out, "--workers", 1, "--quick"), cwd=tmp_path, timeout=300)
    assert run.code == 0, str(run)
    for name in (".report.k1ll3d", ".report.claim"):
        assert not (tmp_path / name).exists() or name in run.out + run.err, f"{name} kept and not named\n{run}"
    assert (out / "report.html").is_file()


# ---------------------------------------------------------------------------------------------------- budgets
def _random_loop(i: int):
    """Closed loop ``i``: a small random plant, an energy budget, and a controller of route ``i % 2``."""
    from stimsteer.control import (DataPredictiveController, LinearNetworkPlant, ModelPredictiveController,
                                   StimLimits, record_session, run_closed_loop)
    from stimsteer.sysid import LsqPredictor, StateSpaceModel

    rng = np.random.default_rng(1000 + i)
    n, m, p = int(rng.integers(1, 4)), int(rng.integers(1, 3)), int(rng.integers(1, 3))
    A = rng.standard_normal((n, n))
    A *= rng.uniform(0.5, 0.9) / np.max(np.abs(np.linalg.eigvals(A)))
    B, C = rng.standard_normal((n, m)), rng.standard_normal((p, n))
    ins, outs = tuple(f"site_{j}" for j in range(m)), tuple(f"ch_{j}" for j in range(p))
    plant = LinearNetworkPlant(A, B, C, process_noise_std=0.01, measurement_noise_std=0.01, sample_rate_hz=100.0,
                               input_names=ins, output_names=outs, seed=i)
    N, U = int(rng.integers(4, 9)), float(rng.uniform(2.0, 10.0))
    budget = float(N * m * U**2 * rng.uniform(0.05, 0.4))  # binding: the target below wants the full amplitude
    limits = StimLimits(amplitude_min_ua=[-U] * m, amplitude_max_ua=[U] * m, energy_budget_ua2=budget,
                        input_names=ins)
    target = C @ np.linalg.solve(np.eye(n) - A, B) @ (U * rng.choice([-1.0, 1.0], m))
    if i % 2 == 0:
        model = StateSpaceModel(A=A, B=B, C=C, past_steps=n, sample_rate_hz=100.0, input_names=ins,
                                output_names=outs)
        ctrl = ModelPredictiveController(model=model, limits=limits, horizon_steps=N, input_weight=1e-4).fit()
    else:
        L = 100
        session = record_session(plant, rng.uniform(-U, U, (4 * L, m)), trials=[(k * L, (k + 1) * L) for k in range(4)])
        ctrl = DataPredictiveController(predictor=LsqPredictor(past_steps=3, horizon_steps=N).fit(session),
                                        limits=limits, horizon_steps=N, input_weight=1e-4).fit()
    result = run_closed_loop(ctrl, plant, n_steps=30, target=target, seed=i)
    return result, N, budget


def _window_energy(u, N):
    """Σ u² over every window of N consecutive applied samples."""
    return np.convolve(np.sum(np.asarray(u) ** 2, axis=1), np.ones(N), mode="valid")


@pytest.mark.slow
def test_no_window_of_applied_inputs_exceeds_the_energy_budget_in_100_random_loops():
    over, n_windows = [], 0
    for i in range(100):
        result, N, budget = _random_loop(i)
        w = _window_energy(result.inputs, N)
        n_windows += w.size
        if np.any(w > budget * (1 + 1e-9)):
            over.append((i, int(np.sum(w > budget * (1 + 1e-9))), w.size, float(w.max() / budget),
                         result.violations["energy_budget"]))
    assert over == [], (f"{len(over)} of 100 loops exceed the budget on {sum(o[1] for o in over)} of {n_windows} "
                        f"windows; worst "
                        f"{max(o[3] for o in over):.2f}x; (loop, windows over, windows, worst, reported): {over[:10]}")


def test_the_minimal_case_of_the_issue_holds_the_budget_in_every_window():
    from stimsteer.control import LinearNetworkPlant, ModelPredictiveController, StimLimits, run_closed_loop
    from stimsteer.sysid import StateSpaceModel

    model = StateSpaceModel(A=[[0.9]], B=[[1.0]], C=[[1.0]], past_steps=1, sample_rate_hz=100.0)
    limits = StimLimits(amplitude_min_ua=[-10.0], amplitude_max_ua=[10.0], energy_budget_ua2=100.0)
    ctrl = ModelPredictiveController(model=model, limits=limits, horizon_steps=10, input_weight=1e-4).fit()
    plant = LinearNetworkPlant([[0.9]], [[1.0]], [[1.0]], sample_rate_hz=100.0, seed=0)
    result = run_closed_loop(ctrl, plant, n_steps=40, target=np.array([100.0]), seed=0)
    w = _window_energy(result.inputs, 10)
    assert w.max() <= 100.0 * (1 + 1e-9), (f"{int(np.sum(w > 100.0))} of {w.size} windows over budget 100; worst "
                                           f"{w.max():.4g} ({w.max() / 100:.2f}x); applied {result.inputs[-1]}; "
                                           f"reported {result.violations}")
