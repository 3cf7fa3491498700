"""Exclusive outputs: every command that writes claims its --out before it reads or computes anything, so a second
run on the same output fails at once with one line (issue 12, item 4: three `plan --out same` all exited 0; two
`fit --out same.h5` both exited 0 once in five; a second `bench` was refused only after all its computing)."""

import os
import subprocess
import sys
import time

import pytest

from stimsteer.control.cli import main
from stimsteer.demo_data import demo_file
from stimsteer.sysid._claims import claim_output

MISSING = "no_such_input.h5"  # every input is missing: a refusal naming the claim proves nothing was read first


def _argv(command, out):
    return {
        "fit": ["fit", MISSING, "--route", "indirect", "--method", "arx", "--out", out],
        "predict": ["predict", MISSING, "--pattern", "no_such.csv", "--out", out],
        "network": ["network", MISSING, "--out", out],
        "plan": ["plan", MISSING, "--target", "a=1", "--limits", "no_such.toml", "--out", out],
        "schedule": ["schedule", "--limits", "no_such.toml", "--inputs", "1", "--order", "5", "--out", out],
        "bench": ["bench", MISSING, "--out", out],
        "demo": ["demo", "--out", out],
    }[command]


WRITERS = ["fit", "predict", "network", "plan", "schedule", "bench", "demo"]
FILE_OUTPUTS = {"fit": "model.h5", "schedule": "schedule.csv"}


def _one_line(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert "Traceback" not in err[0]
    return err[0]


@pytest.mark.parametrize("command", WRITERS)
def test_a_second_run_on_a_claimed_output_is_refused_before_reading_anything(command, tmp_path, capsys,
                                                                            monkeypatch):
    monkeypatch.chdir(tmp_path)
    out = tmp_path / FILE_OUTPUTS.get(command, "out")
    with claim_output(out):  # another live run (this process) holds the output
        assert main(_argv(command, str(out))) == 2
    line = _one_line(capsys)
    assert f"{out} is being written by another run (process {os.getpid()})" in line
    assert MISSING not in line and not out.exists()


@pytest.mark.parametrize("command", WRITERS)
def test_an_existing_output_is_refused_before_reading_anything_unless_forced(command, tmp_path, capsys,
                                                                            monkeypatch):
    monkeypatch.chdir(tmp_path)
    out = tmp_path / FILE_OUTPUTS.get(command, "out")
    if command in FILE_OUTPUTS:
        out.write_text("kept")
    else:
        out.mkdir()
        (out / "kept.txt").write_text("kept")
    assert main(_argv(command, str(out))) == 2
    line = _one_line(capsys)
    assert "--force" in line and MISSING not in line
    assert sorted(p.name for p in tmp_path.iterdir()) == [out.name]  # no claim, no temporary left
    if command == "demo":  # its inputs are shipped: with --force it would run whole
        return
    # with --force the claim passes and the run goes on to read its (missing) inputs
    code = main(_argv(command, str(out)) + ["--force"])
    assert code == 2 and "--force" not in _one_line(capsys)


def _stimsteer(*argv, **kwargs):
    code = "import sys; from stimsteer.control.cli import main; sys.exit(main())"
    return subprocess.Popen([sys.executable, "-c", code, *argv], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, **kwargs)


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    path = tmp_path_factory.mktemp("model") / "arx.h5"
    assert main(["fit", str(demo_file("demo_session.h5")), "--route", "indirect", "--method", "arx",
                 "--past-steps", "4", "--horizon-steps", "10", "--out", str(path)]) == 0
    return path


@pytest.mark.slow
def test_of_three_concurrent_plans_on_one_folder_exactly_one_writes_it(model, tmp_path):
    out = tmp_path / "plan"
    argv = ["plan", str(model), "--target", "rec_01=15", "--limits", str(demo_file("demo_limits.toml")),
            "--horizon-steps", "10", "--out", str(out)]
    procs = [_stimsteer(*argv) for _ in range(3)]
    done = [(p.wait(timeout=300), *p.communicate()) for p in procs]
    codes = sorted(code for code, _, _ in done)
    assert codes == [0, 2, 2], done
    for code, _, err in done:
        if code == 2:  # refused at the claim (still running) or at the existing folder (already written)
            assert len(err.strip().splitlines()) == 1 and ("another run" in err or "--force" in err), err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["plan"]
    assert sorted(p.name for p in out.iterdir()) == ["plan.csv", "plan.json", "plan.png", "plan_pattern.csv"]


@pytest.mark.slow
def test_of_two_concurrent_fits_on_one_model_file_exactly_one_writes_it(tmp_path):
    out = tmp_path / "same.h5"
    argv = ["fit", str(demo_file("demo_session.h5")), "--route", "indirect", "--method", "arx",
            "--past-steps", "4", "--horizon-steps", "10", "--out", str(out)]
    procs = [_stimsteer(*argv) for _ in range(2)]
    done = [(p.wait(timeout=300), *p.communicate()) for p in procs]
    assert sorted(code for code, _, _ in done) == [0, 2], done
    winner = next(o for c, o, _ in done if c == 0)
    assert f"model written to {out}" in winner
    assert sorted(p.name for p in tmp_path.iterdir()) == ["same.h5"]


@pytest.mark.slow
def test_a_second_bench_on_a_running_benchs_folder_is_refused_while_the_first_computes(tmp_path):
    out = tmp_path / "report"
    first = _stimsteer("bench", str(demo_file("demo_session.h5")), "--quick", "--workers", "1", "--out", str(out))
    try:
        claim = tmp_path / ".report.claim"
        for _ in range(600):
            if claim.exists() or first.poll() is not None:
                break
            time.sleep(0.05)
        second = _stimsteer("bench", str(demo_file("demo_session.h5")), "--quick", "--out", str(out))
        code, _, err = second.wait(timeout=120), *second.communicate()
        assert first.poll() is None, "the first run ended before the second was refused; nothing was shown"
        assert code == 2 and err.strip() == (f"stimsteer bench: error: {out} is being written by another run "
                                             f"(process {first.pid}); wait for it to end or choose another --out.")
    finally:
        first.terminate()
        first.communicate(timeout=120)
    assert first.returncode == 143 and list(tmp_path.iterdir()) == []
