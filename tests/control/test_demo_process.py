"""The demo's own process: Python's cycle collector while its steps run, in this process and in the step beside.

Outside check: what Python's own ``gc`` module reports (``gc.get_threshold``, ``gc.get_freeze_count``; Python
documentation, "gc — Garbage Collector interface"). The 10,000 frozen objects are a floor well below what the
command modules' imports leave (about 130,000 measured here, control/demo.py), so any freeze of them passes.
"""

import gc
import os


def test_the_steps_run_with_imports_frozen_and_a_larger_young_generation_and_the_collector_is_put_back(tmp_path):
    from stimsteer.control.demo import _YOUNG_OBJECTS, run_demo

    seen = {}

    def step(argv):
        print(f"{argv[0]} {os.getpid()} {gc.get_threshold()[0]} {gc.get_freeze_count()}")
        return 0

    before, frozen = gc.get_threshold(), gc.get_freeze_count()
    shown = []
    run_demo(tmp_path / "demo", run_step=step, echo=shown.append)
    for line in shown:
        words = line.split()
        if len(words) == 4 and words[2].isdigit():
            seen[words[0]] = (int(words[1]), int(words[2]), int(words[3]))
    assert set(seen) == {"inspect", "fit", "predict", "network", "plan", "schedule", "bench"}
    # every step, this process's and the forked bench step's, sees the setting; the frozen objects are the imports
    assert all(young == _YOUNG_OBJECTS and n_frozen > 10_000 for _pid, young, n_frozen in seen.values())
    assert gc.get_threshold() == before and gc.get_freeze_count() == frozen
