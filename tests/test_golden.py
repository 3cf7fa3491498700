"""The golden comparison itself (tests/golden.py): strict in the snapshot's environment, open-loop numbers only
elsewhere, and numbers written as text compared as numbers."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import golden  # noqa: E402


def _snap(loop: float, fit: float, text: str = "0.9197580775196369") -> dict:
    return {"bench:tasks": [{"r2_mean": fit, "tracking_rms": loop, "use_energy_budget": loop}],
            "bench:comparison": [{"metric": "r2_mean", "mean_difference": fit},
                                 {"metric": "energy_ua2", "mean_difference": loop}],
            "bench:control": [{"energy_ua2": loop}], "network/controllability.csv": {"data": [[text]]}}


def test_in_the_snapshots_environment_every_number_is_compared_strictly():
    stored = {**_snap(5.382, 0.91), golden.ENVIRONMENT_KEY: golden.environment()}
    differences, mode = golden.check(stored, _snap(5.386, 0.91))
    assert mode == "same environment" and len(differences) == 4  # both closed-loop columns, the metric, the table
    assert golden.check(stored, _snap(5.382, 0.91))[0] == []


def test_on_another_machine_closed_loop_numbers_are_left_out_and_the_rest_compared():
    stored = {**_snap(5.382, 0.91), golden.ENVIRONMENT_KEY: {"blas": ["another kernel"]}}
    differences, mode = golden.check(stored, _snap(5.386, 0.91, "0.9197580775196281"))
    assert differences == [] and "closed-loop numbers left out" in mode
    differences, _ = golden.check(stored, _snap(5.382, 0.9101))  # an open-loop number that moved is still found
    assert len(differences) == 2
    differences, _ = golden.check(stored, _snap(5.382, 0.91, "0.92"))
    assert differences == ["/network/controllability.csv/data[0][0]: stored '0.9197580775196369', fresh '0.92'"]
