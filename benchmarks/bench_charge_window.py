"""How much of a declared charge-rate window budget a closed loop can use: the old Σ u² stand-in against the exact
linear window budget (issue 16, the limits side).

Before this session the charge budget ``Q_w`` over windows of ``window_s`` seconds was enforced as an energy budget
``Σ u² <= Q_w² / (W · Σ c_i²)`` over ``W = ceil(window_s · rate) + 1`` samples (Cauchy–Schwarz). Now it is the
linear window budget ``Σ_k c · u_k <= Q_w`` over the samples a window's pulses can fall in
(:func:`stimsteer.control.physical_limits.window_steps`). Both are run here on the same random loops (one site
driven hard towards a far target, so the budget binds) and the largest delivered window charge is measured on the
decoded pulses, as a fraction of ``Q_w``. Run: ``python benchmarks/bench_charge_window.py`` (about a minute idle).
"""

from __future__ import annotations

import dataclasses
import math
import os
import time

import numpy as np

from stimsteer.control.limits import StimLimits
from stimsteer.control.loop import run_closed_loop
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.control.physical_limits import PhysicalLimits, compile_limits
from stimsteer.control.plants import LinearNetworkPlant
from stimsteer.control.pulse_plan import window_charges_uc
from stimsteer.control.random_networks import random_network
from stimsteer.sysid import StateSpaceModel
from stimsteer.sysid.stimulation import InputMapping, StimulationDescription, decode_plan

RATE = 250.0


def _case(seed, freq):
    g = np.random.default_rng(seed)
    m = InputMapping(StimulationDescription.from_dict({"sites": {"a": {
        "kind": "electrical", "phase_width": "90 us", "frequency": f"{freq} Hz", "contact_area": "0.06 cm^2"}}}), RATE)
    bound = float(g.uniform(50, 400))
    table = {"window_s": float(g.uniform(0.05, 0.5)), "sites": {"a": {"amplitude_max_ua": bound}}}
    table["charge_rate_max_uc_per_s"] = float(g.uniform(0.2, 0.8)) * bound * 90e-6 * freq
    new = compile_limits(PhysicalLimits.from_dict(table), m)
    new_lim = dataclasses.replace(new.stim_limits, input_names=None)
    # the stand-in of the previous version (physical_limits._window_budget until this session)
    q_w = table["charge_rate_max_uc_per_s"] * table["window_s"]
    w_old = int(math.ceil(table["window_s"] * RATE - 1e-9)) + 1
    c = m.charge_per_model_unit_uc()
    lo, hi = new_lim.input_bounds()
    old_lim = StimLimits(amplitude_min_ua=lo, amplitude_max_ua=hi, energy_budget_ua2=q_w**2 / (w_old * float(
        np.sum(c**2))), energy_window_steps=w_old)
    n = int(g.integers(2, 4))
    A = random_network(n, density=0.6, seed=g, scale=float(g.uniform(0.5, 0.9)), self_weight=0.3, signed=False)
    plant = LinearNetworkPlant(A, np.abs(g.normal(size=(n, 1))) * 0.05, np.abs(g.normal(size=(1, n))),
                               measurement_noise_std=0.01, seed=int(g.integers(1 << 30)))
    return m, table, q_w, old_lim, new_lim, plant, g.uniform(20.0, 100.0, size=1)


def _used(m, table, q_w, lim, plant, target, seed):
    ss = StateSpaceModel(A=plant.A, B=plant.B, C=plant.C, past_steps=plant.A.shape[0])
    ctrl = ModelPredictiveController(model=ss, limits=lim, horizon_steps=6, input_weight=1e-6).fit()
    loop = run_closed_loop(ctrl, plant, n_steps=150, target=target, seed=seed, use_fast_path=False)
    worst = float(np.max(window_charges_uc(decode_plan(loop.inputs, m), table["window_s"]), initial=0.0))
    return worst / q_w


def main(n_loops=8):
    print(f"load average at start: {os.getloadavg()}")
    t0 = time.perf_counter()
    rows = []
    for ratio in (1.0, 0.5, 2.0):
        before, after = [], []
        for seed in range(n_loops):
            m, table, q_w, old_lim, new_lim, plant, target = _case(seed, ratio * RATE)
            before.append(_used(m, table, q_w, old_lim, plant, target, seed))
            after.append(_used(m, table, q_w, new_lim, plant, target, seed))
        rows.append((ratio, before, after))
    print("\n| train frequency / sample rate | loops | charge used before (min-median-max) | after (min-median-max) |")
    print("| --- | --- | --- | --- |")
    for ratio, b, a in rows:
        print(f"| {ratio:g} | {len(b)} | {min(b):.3f} - {np.median(b):.3f} - {max(b):.3f} | "
              f"{min(a):.3f} - {np.median(a):.3f} - {max(a):.3f} |")
    print(f"\nno window over its budget: {all(x <= 1 + 1e-9 for _, b, a in rows for x in b + a)}; "
          f"{time.perf_counter() - t0:.0f} s; load average at end: {os.getloadavg()}")


if __name__ == "__main__":
    main()
