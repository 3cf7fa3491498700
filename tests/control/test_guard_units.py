"""The guard that accepts a solver's answer means the same in any unit of the inputs (issue 16, the limits side)."""

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.sysid import StateSpaceModel


@pytest.mark.parametrize("over, accepted", [(2e-6, True), (2e-5, False)])
def test_the_guard_tolerance_is_the_same_fraction_of_a_bound_in_ma_and_ua(over, accepted):
    """The tolerance was ``1e-5 · max(1, bound)``: for a 0.2 mA bound 1e-5 mA (10 nA), for 200 µA 2e-3 µA (2 nA),
    so an answer 4 nA past the bound passed in mA and failed in µA. Relative to the bound, both decide alike
    (common practice: a tolerance relative to the quantity it bounds, no source)."""
    model = StateSpaceModel(A=[[0.5]], B=[[1.0]], C=[[1.0]], past_steps=1)
    verdicts = []
    for bound in (0.2, 200.0):  # the same 200 µA bound, in mA and in µA
        lim = StimLimits(amplitude_min_ua=[0.0], amplitude_max_ua=[bound])
        ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=3).fit()
        lb, ub, _ = ctrl._step_bounds(np.zeros(1))
        u, why = ctrl._project(np.full((3, 1), bound * (1 + over)), lb, ub, np.zeros(1), None)
        verdicts.append(u is not None)
        if u is not None:
            assert np.all(u <= bound)  # clipped onto the exact bound
        else:
            assert "breaks a hard limit" in why
    assert verdicts == [accepted, accepted]


def test_the_slew_allowance_of_violations_is_relative_to_the_limit():
    # 0.1 mA and 100 µA of slew, an excess of 5e-7 of it: the same verdict in both units (it was 1e-9 · max(1, s))
    verdicts = []
    for s in (0.1, 100.0):
        lim = StimLimits(amplitude_min_ua=[-10 * s], amplitude_max_ua=[10 * s], slew_max_ua=[s])
        verdicts.append(lim.violations(np.array([[0.0], [s * (1 + 5e-10)]]), rtol=1e-9)["slew"])
        verdicts.append(lim.violations(np.array([[0.0], [s * (1 + 5e-9)]]), rtol=1e-9)["slew"])
    assert verdicts == [0, 1, 0, 1]


def test_a_signed_plan_without_a_description_says_so_and_a_physical_one_does_not():
    """Decision of issue 16 (control/_plan_physical.py): signed per-sample plans are planned, with a note."""
    from types import SimpleNamespace

    from stimsteer.control._plan_physical import signed_input_notes

    plan = SimpleNamespace(inputs=np.array([[1.0, -2.5], [0.5, 3.0]]), input_names=("a", "b"))
    notes = signed_input_notes(plan, None)
    assert len(notes) == 1 and "b down to -2.5" in notes[0] and "opposite polarity" in notes[0]
    assert "a down" not in notes[0]
    assert signed_input_notes(SimpleNamespace(inputs=np.abs(plan.inputs), input_names=("a", "b")), None) == []
    assert signed_input_notes(plan, object()) == []  # physical limits: inputs are non-negative by construction
