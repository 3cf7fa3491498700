"""`stimsteer demo`: the whole job on the shipped session, end to end, as a new user runs it."""

import json
import sys
from pathlib import Path

import pytest

from stimsteer.control.cli import CAUTION, main
from stimsteer.control.demo import demo_steps


def test_demo_steps_cover_every_task_of_the_job():
    names = [argv[0] for _, argv in demo_steps("s.h5", "p.h5", "l.toml", "out")]
    assert names == ["inspect", "fit", "fit", "predict", "predict", "network", "plan", "plan", "plan", "schedule",
                     "bench"]


def test_demo_refuses_a_folder_that_holds_another_run(tmp_path, capsys):
    (tmp_path / "old.txt").write_text("another run")
    assert main(["demo", "--out", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--force" in err[0]
    assert (tmp_path / "old.txt").read_text() == "another run"


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    """One demo run for the module's tests: (its folder, what it printed)."""
    import contextlib
    import io

    out = tmp_path_factory.mktemp("demo") / "demo"
    printed = io.StringIO()
    with contextlib.redirect_stdout(printed):
        assert main(["demo", "--out", str(out)]) == 0
    return out, printed.getvalue()


@pytest.mark.slow
def test_demo_numbers_are_those_of_the_stored_run(demo_run):
    # Every seeded number of the demo (benchmark tables less timings, plans, predictions, network tables,
    # schedule) equals the run stored before the layout of the code was changed (tests/golden.py).
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    import golden

    differences, mode = golden.check(golden.load_stored(), golden.snapshot(demo_run[0]), rtol=1e-9)
    print(f"golden comparison: {mode}")
    assert not differences, mode + "\n" + "\n".join(differences)


@pytest.mark.slow
def test_demo_runs_end_to_end_and_every_plan_respects_the_declared_limits(demo_run):
    out, printed = demo_run
    tmp_path = out.parent
    assert f"open the report: {out / 'report' / 'report.html'}" in printed
    assert printed.rstrip().endswith(CAUTION)
    html = (out / "report" / "report.html").read_text(encoding="utf-8")
    assert "research software, not a medical device" in html
    for route in ("indirect", "direct"):
        assert (out / f"predict_{route}" / "prediction.png").stat().st_size > 0
        plan = json.loads((out / f"plan_{route}" / "plan.json").read_text())
        assert plan["status"] == "optimal"
        # the plan file itself must stay inside the hard window it prints beside every step
        import pandas as pd

        table = pd.read_csv(out / f"plan_{route}" / "plan.csv", comment="#")
        for col in [c for c in table.columns if c.startswith("in:")]:
            name = col[3:].split(" [")[0]
            low = table[[c for c in table.columns if c.startswith(f"lower:{name} ")][0]]
            high = table[[c for c in table.columns if c.startswith(f"upper:{name} ")][0]]
            assert (table[col] >= low - 1e-9).all() and (table[col] <= high + 1e-9).all()
    # the plan in physical terms: pulse files with every check passed, amplitudes within the declared limits
    pulses = json.loads((out / "plan_pulses" / "plan.json").read_text())["pulse_plan"]
    assert pulses["all_checks_passed"] and pulses["status"] == "optimal"
    table = pd.read_csv(out / "plan_pulses" / "plan_pulses.csv", comment="#")
    assert len(table) and (table["amplitude_ua"] <= 50.0 + 1e-9).all()
    assert (out / "plan_pulses" / "plan_pulses.nwb").is_file()
    assert (out / "network" / "site_ranking.png").is_file()
    assert (out / "next_schedule.csv").is_file()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary folder left behind


@pytest.mark.slow
def test_the_demos_plans_name_model_files_that_exist_in_its_folder(demo_run):
    # the steps write into a temporary folder renamed to --out at the end; plan.json named that deleted folder
    out, _ = demo_run
    for route, model in (("indirect", "indirect_subspace.h5"), ("direct", "direct_hankel.h5")):
        folder = out / f"plan_{route}"
        plan = json.loads((folder / "plan.json").read_text())
        # a model inside the same tree is named relative to the plan folder, so the record survives moving the tree
        named = (folder / plan["model_file"]).resolve()
        assert named == (out / "models" / model).resolve() and named.is_file()


def test_an_interrupted_step_interrupts_the_demo_with_its_code_and_leaves_nothing(tmp_path):
    from stimsteer.control.commands._common import Interrupted
    from stimsteer.control.demo import run_demo

    steps = []

    def step(argv):
        steps.append(argv[0])
        return 143 if argv[0] == "fit" else 0  # SIGTERM reached the fit step

    with pytest.raises(Interrupted) as caught:
        run_demo(tmp_path / "demo", run_step=step, echo=lambda text: None)
    assert caught.value.code == 143 and steps == ["inspect", "fit"]
    assert list(tmp_path.iterdir()) == []


def test_the_bench_step_runs_in_a_child_beside_the_others_and_is_shown_in_its_turn(tmp_path):
    import multiprocessing
    import os

    from stimsteer.control.demo import run_demo

    def step(argv):
        print(f"ran {argv[0]} in process {os.getpid()}")
        return 0

    shown = []
    run_demo(tmp_path / "demo", run_step=step, echo=shown.append)
    ran = [line for line in shown if line.startswith("ran ")]
    assert [line.split()[1] for line in ran] == [argv[0] for _, argv in demo_steps("s", "p", "l", "o")]
    own = f"in process {os.getpid()}"
    assert all(line.endswith(own) for line in ran[:-1])
    if "fork" in multiprocessing.get_all_start_methods():
        assert not ran[-1].endswith(own)  # the bench step ran in another process, and is shown last all the same


def test_a_failed_bench_step_fails_the_demo_with_its_code_and_leaves_nothing(tmp_path):
    from stimsteer.control.demo import DemoStepFailed, run_demo

    with pytest.raises(DemoStepFailed) as caught:
        run_demo(tmp_path / "demo", run_step=lambda argv: 2 if argv[0] == "bench" else 0, echo=lambda text: None)
    assert caught.value.code == 2 and caught.value.step == "bench"
    assert list(tmp_path.iterdir()) == []


def test_an_early_failure_stops_the_bench_step_running_beside_it(tmp_path):
    import time

    from stimsteer.control.commands._common import Interrupted
    from stimsteer.control.demo import run_demo

    def step(argv):
        if argv[0] == "bench":
            time.sleep(60)  # would hold the demo for a minute if it were not stopped
        return 143 if argv[0] == "predict" else 0

    t0 = time.perf_counter()
    with pytest.raises(Interrupted):
        run_demo(tmp_path / "demo", run_step=step, echo=lambda text: None)
    assert time.perf_counter() - t0 < 30
    assert list(tmp_path.iterdir()) == []
