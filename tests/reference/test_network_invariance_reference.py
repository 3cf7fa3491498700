"""Coordinate-free network figures: invariance under a change of state basis, and a cvxpy least-norm check.

Sources: a linear change of state coordinates x -> T x leaves every input-output map unchanged (Kailath 1980,
Linear Systems, Sec. 2.1; from memory), so every figure the project reports by default for a fitted model must be
unchanged to rounding. The output-target minimum energy is checked against cvxpy solving the same least-norm problem
(Boyd and Vandenberghe 2004, Convex Optimization, Sec. 6.2, least-norm problems).
"""

import cvxpy as cp
import numpy as np
import pytest

from stimsteer.sysid import StateSpaceModel
from stimsteer.sysid.network import (
    impulse_responses, output_controllability, output_gramian, output_transition, rank_sites_by_output, reachability_matrix,
    site_output_controllability,
)


def _fitted_like(rng, n=10, m=3, p=8, rho=0.9):
    A = rng.standard_normal((n, n))
    A *= rho / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.standard_normal((n, m)), C=rng.standard_normal((p, n)),
                           input_names=("a", "b", "c"), output_names=tuple(f"ch{i}" for i in range(p)))


def _transformed(model, T):
    Ti = np.linalg.inv(T)
    return model.replace(A=T @ model.A @ Ti, B=T @ model.B, C=model.C @ Ti)


def _default_figures(model, target, start):
    """Every number the default (coordinate-free) network report of a fitted model holds."""
    rep = output_controllability(model)
    sites = site_output_controllability(model)
    tr = output_transition(model, target, horizon_steps=12, y_start=start)
    rk = rank_sites_by_output(model, target, horizon_steps=12, y_start=start, max_set_size=2)
    return {
        "gramian": rep.gramian, "eig": rep.gramian_eigenvalues, "rank": rep.output_rank, "h2": rep.h2_squared,
        "site_h2": sites.h2_squared, "site_rank": sites.output_rank, "energy": tr.energy, "u": tr.u,
        "reached": tr.y_reached, "ranking_energy": rk.energy, "ranking_names": rk.names,
        "impulse": impulse_responses(model, 20), "pair_gramian": output_gramian(model, sites=["a", "c"]),
    }


@pytest.mark.parametrize("trial", range(5))
def test_every_default_figure_is_unchanged_by_a_random_change_of_state_basis(rng, trial):
    model = _fitted_like(rng)
    target, start = rng.standard_normal(8), rng.standard_normal(8)
    base = _default_figures(model, target, start)
    T = rng.standard_normal((10, 10)) * rng.uniform(0.1, 10.0, size=10)  # badly scaled on purpose
    moved = _default_figures(_transformed(model, T), target, start)
    for key, value in base.items():
        if key == "ranking_names":
            assert moved[key] == value
        else:
            np.testing.assert_allclose(moved[key], value, rtol=1e-9, atol=1e-9 * max(1.0, np.max(np.abs(value))),
                                       err_msg=key)


def test_output_minimum_energy_equals_a_cvxpy_least_norm_solve(rng):
    # Boyd & Vandenberghe (2004), Sec. 6.2: minimise ||v||² subject to C R v = y - C A^T x0.
    model = _fitted_like(rng)
    y = rng.standard_normal(8)
    T = 12
    tr = output_transition(model, y, horizon_steps=T)
    R = reachability_matrix(model, T)
    v = cp.Variable(R.shape[1])
    prob = cp.Problem(cp.Minimize(cp.sum_squares(v)), [model.C @ R @ v == y])
    prob.solve(solver="CLARABEL")
    assert prob.status == "optimal"
    assert tr.reachable
    assert tr.energy == pytest.approx(prob.value, rel=1e-6)
    np.testing.assert_allclose(tr.u.reshape(-1), v.value, atol=1e-5 * np.max(np.abs(v.value)))


def test_free_channels_are_left_out_of_the_constraint_like_in_cvxpy(rng):
    model = _fitted_like(rng)
    y = rng.standard_normal(8)
    tr = output_transition(model, y, horizon_steps=6, free_channels=["ch1", "ch5"], sites=["a", "c"])
    R = reachability_matrix(model, 6).reshape(10, 6, 3)[:, :, [0, 2]].reshape(10, -1)
    keep = [0, 2, 3, 4, 6, 7]
    v = cp.Variable(R.shape[1])
    prob = cp.Problem(cp.Minimize(cp.sum_squares(v)), [model.C[keep] @ R @ v == y[keep]])
    prob.solve(solver="CLARABEL")
    assert tr.energy == pytest.approx(prob.value, rel=1e-6)
    assert tr.constrained == tuple(f"ch{i}" for i in keep)
    np.testing.assert_allclose(tr.y_reached[keep], y[keep], atol=1e-8)
    assert np.all(tr.u[:, 1] == 0.0)


def test_output_energy_is_far_below_the_minimum_norm_state_energy(rng):
    # What was measured: with fewer channels than states, C⁺y as the target state cost 3,000-48,000x the least
    # energy that produces the pattern. The output-constrained energy is never above it (C⁺y is one feasible state).
    from stimsteer.sysid.network import minimum_energy_transition

    model = _fitted_like(rng)
    y = rng.standard_normal(8)
    out = output_transition(model, y, horizon_steps=12, sites=["a"], reach_rtol=1e-6)
    via_state = minimum_energy_transition(model, np.linalg.pinv(model.C) @ y, horizon_steps=12, sites=["a"])
    if via_state.reachable:
        assert out.energy <= via_state.energy * (1 + 1e-9)
    all_out = output_transition(model, y, horizon_steps=12)
    all_state = minimum_energy_transition(model, np.linalg.pinv(model.C) @ y, horizon_steps=12)
    assert all_out.energy < all_state.energy


def test_site_h2_is_the_sum_of_squared_markov_parameters(rng):
    # Zhou, Doyle, Glover (1996), Sec. 4.4: ||G||²_H2 = sum_k ||C A^k B||²_F (strictly proper part).
    model = _fitted_like(rng, rho=0.7)
    h = impulse_responses(model, 400)[1:]
    np.testing.assert_allclose(site_output_controllability(model).h2_squared, np.sum(h ** 2, axis=(0, 1)),
                               rtol=1e-10)


def test_every_default_table_of_the_command_is_unchanged_by_a_change_of_state_basis(rng, tmp_path):
    # The same source (Kailath 1980, Sec. 2.1): run `stimsteer network` as a user would on a fitted model and on the
    # same model in other coordinates; every number of every default table must agree to 1e-9.
    import pandas as pd

    from stimsteer.control.cli import main
    from stimsteer.sysid import save_predictor

    model = _fitted_like(rng)
    T = rng.standard_normal((10, 10)) * rng.uniform(0.1, 10.0, size=10)
    outs = []
    for i, m in enumerate((model, _transformed(model, T))):
        save_predictor(m, tmp_path / f"m{i}.h5", provenance={"origin": "test"})
        outs.append(tmp_path / f"n{i}")
        target = ",".join(f"{v:.6f}" for v in rng.standard_normal(8)) if i == 0 else target
        assert main(["network", str(tmp_path / f"m{i}.h5"), "--target", target, "--free", "ch3",
                     "--out", str(outs[-1])]) == 0
    csvs = sorted(p.name for p in outs[0].glob("*.csv"))
    assert csvs == sorted(p.name for p in outs[1].glob("*.csv")) and len(csvs) == 7
    for name in csvs:
        a, b = pd.read_csv(outs[0] / name), pd.read_csv(outs[1] / name)
        assert list(a.columns) == list(b.columns), name
        for col in a.columns:
            x, y = a[col], b[col]
            xn, yn = pd.to_numeric(x, errors="coerce"), pd.to_numeric(y, errors="coerce")
            if xn.notna().all():
                scale = max(1.0, float(np.max(np.abs(xn[np.isfinite(xn)])))) if np.isfinite(xn).any() else 1.0
                np.testing.assert_allclose(yn, xn, rtol=1e-9, atol=1e-9 * scale, err_msg=f"{name}:{col}")
            else:  # mixed cells (the summary table): numbers to 1e-9, words exactly
                for u, v in zip(x, y):
                    if pd.notna(pd.to_numeric(u, errors="coerce")):
                        assert float(v) == pytest.approx(float(u), rel=1e-9, abs=1e-12), f"{name}:{col}: {u} {v}"
                    else:
                        assert u == v, f"{name}:{col}"
