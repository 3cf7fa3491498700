"""Cost of the rolling energy budget in a closed loop (issue 12: budgets over windows of applied stimulation).

Setup (not timed): the network of ``bench_control.py`` (12 states, 4 inputs, 16 outputs, horizon 20), amplitude
±1 µA and a slew limit of 0.5 µA per step, a constant target far enough to use the inputs. Timed, in the same run,
the median closed-loop step (``run_closed_loop``'s per-plan solve time) of the indirect controller:

* baseline — no energy budget (the fast path, the OSQP problem alone);
* loose — a budget of 200 µA² per 20 samples, which the loop does not reach (it uses 80): the fast path plus the
  check of every window (its answer is kept);
* binding — a budget of 4 µA² per 20 samples, which binds: the cvxpy cone program with the window constraints
  (per-step energies, the ramp windows after the plan, the budget left by the applied past as a Parameter).

Ratios: loose ÷ baseline (the price of the window check on the fast path) and binding ÷ baseline (a cone solve).
Also printed: the largest window of applied inputs ÷ the budget (<= 1 required) and the windows over the budget.

Run from the repository root:  .venv/bin/python benchmarks/bench_budget.py [--steps 200]
"""

from __future__ import annotations

import argparse

import numpy as np

from stimsteer.control.limits import StimLimits
from stimsteer.control.loop import run_closed_loop
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.control.plants import LinearNetworkPlant

from bench_control import HORIZON, N_INPUTS, _system


def _run(model, budget, steps):
    lim = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.0, slew_max_ua=0.5, n_inputs=N_INPUTS,
                     energy_budget_ua2=budget)
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=HORIZON).fit()
    plant = LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.01, seed=3)
    target = 2.0 * model.C @ np.linalg.solve(np.eye(model.n_states) - model.A, model.B @ np.full(N_INPUTS, 0.5))
    loop = run_closed_loop(ctrl, plant, n_steps=steps, target=target, seed=1)
    return loop


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=200, help="closed-loop steps per measurement (default 200)")
    steps = ap.parse_args(argv).steps
    model, _ = _system(0)
    print(f"system: {model.n_states} states, {model.n_inputs} inputs, {model.n_outputs} outputs, horizon {HORIZON}, "
          "amplitude ±1 µA, slew 0.5 µA/step")
    base = None
    for name, budget in (("baseline (no budget)", None), ("loose budget 200 µA²", 200.0),
                         ("binding budget 4 µA²", 4.0)):
        loop = _run(model, budget, steps)
        med = float(np.median(loop.solve_time_s)) * 1e6
        base = med if base is None else base
        extra = "" if budget is None else (f", largest applied window / budget {loop.energy_window_max_ratio:.6f}, "
                                           f"windows over budget {loop.violations['energy_budget']}, "
                                           f"plans with the budget binding {loop.limit_use['energy_budget']:.2f}")
        print(f"{name}: median step {med:.0f} µs, ratio to baseline {med / base:.2f}{extra}")


if __name__ == "__main__":
    main()
