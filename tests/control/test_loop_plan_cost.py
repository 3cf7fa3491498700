"""The closed loop's plans at less cost, with the same numbers (control/mpc/_budget.py, _budget_sqp.py, _core.py).

Closed loops under a binding budget amplify any last-digit change (tests/golden.py), so each shortcut is checked
against the plain computation it replaces, bit for bit; and each test also checks that the work is skipped (those
parts fail on the code before the shortcut).

Outside checks: the plain bisection itself, and the definitions of the rolling budget's window energies, written out
here (common practice, no source): window energy = past + Σ over the window's plan steps of Σ_i u_ki² + the ramp
steps' Σ_i max(|u_N−1,i| − t·slew_i, 0)².
"""

import numpy as np
import pytest

from stimsteer.control.mpc import _budget
from stimsteer.control.mpc._budget import _RollingBudget, blend_all


def _plain(b, u, hist):
    """A window's energies by the plain formula (module docstring)."""
    ramp = np.zeros(0)
    if b.n_tail:
        t = np.arange(1, b.n_tail + 1)[:, None]
        r = np.maximum(np.abs(u[-1][b.fin])[None, :] - t * b.slew[b.fin][None, :], 0.0)
        ramp = np.sum(r**2, axis=1)
    return b.Mh @ hist + b.Mp @ np.sum(u**2, axis=1) + b.Mr @ ramp


def _plain_blend(budgets, hists, u, safe, energies=lambda b, x, h: b.energies(x, h, b.Mh @ h)):
    caps = [b.budget * (1.0 - 1e-10) for b in budgets]

    def inside(x):
        return all(np.max(energies(b, x, h)) <= cap for b, h, cap in zip(budgets, hists, caps))

    if inside(u):
        return u
    lo, hi = 0.0, 1.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if mid == lo or mid == hi:
            break
        lo, hi = (mid, hi) if inside(mid * u + (1.0 - mid) * safe) else (lo, mid)
    return lo * u + (1.0 - lo) * safe


def _at_budget(b, hist, u, scale):
    """``u`` scaled so that its largest window holds ``scale`` times the budget (to rounding)."""
    lo, hi = 0.0, 1.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if np.max(b.energies(mid * u, hist, b.Mh @ hist)) <= scale * b.budget else (lo, mid)
    return hi * u


@pytest.mark.parametrize("excess", [1e-15, 1e-9, 0.3])
@pytest.mark.parametrize("window, slew", [(20, [15.0, 15.0, 15.0]), (26, [15.0, np.inf, 4.0]), (8, None)])
def test_the_blend_skipping_decided_steps_is_the_plain_bisection_bit_for_bit(window, slew, excess, monkeypatch):
    b = _RollingBudget(20000.0, window, 20, None if slew is None else np.array(slew))
    rng = np.random.default_rng(5)
    calls = []
    real = _RollingBudget.energies
    monkeypatch.setattr(_RollingBudget, "energies", lambda self, *a: calls.append(1) or real(self, *a))
    n_blends = 0
    for _ in range(6):
        hist = rng.uniform(0.0, 300.0, size=window - 1)
        u = _at_budget(b, hist, rng.uniform(0.0, 50.0, size=(20, 3)), 1.0 + excess)
        # the safe sequence well inside, or close to the budget itself (a flat load along the blend)
        safe = _at_budget(b, hist, rng.uniform(0.0, 50.0, size=(20, 3)), rng.choice([0.2, 0.9, 0.999]))
        calls.clear()
        got = blend_all([b], [hist], u, safe)
        ours = len(calls)
        want = _plain_blend([b], [hist], u, safe)
        assert np.array_equal(got, want)
        if ours > 1:  # a blend (not u itself): fewer loads computed than the bisection's steps
            n_blends += 1
            assert ours < len(calls) - ours
    assert n_blends > 0


def test_the_blend_under_two_budgets_is_the_plain_bisection_bit_for_bit():
    short = _RollingBudget(5000.0, 5, 20, np.array([15.0, 15.0, 15.0]))
    long = _RollingBudget(20000.0, 20, 20, np.array([15.0, 15.0, 15.0]))
    rng = np.random.default_rng(9)
    for _ in range(20):
        hists = [short.history(rng.uniform(0, 20, (19, 3))), long.history(rng.uniform(0, 20, (19, 3)))]
        u, safe = rng.uniform(0.0, 40.0, size=(20, 3)), rng.uniform(0.0, 5.0, size=(20, 3))
        assert np.array_equal(blend_all([short, long], hists, u, safe), _plain_blend([short, long], hists, u, safe))


def test_the_blend_with_nan_inputs_never_calls_them_inside():
    b = _RollingBudget(100.0, 4, 6, None)
    u = np.full((6, 2), 8.0)
    u[2, 1] = np.nan
    got = blend_all([b], [np.zeros(3)], u, np.zeros((6, 2)))
    assert np.array_equal(got, _plain_blend([b], [np.zeros(3)], u, np.zeros((6, 2))), equal_nan=True)


def _plain_sqp(H, q, A, lo, hi, x0, windows):
    """The budget SQP as first written: the windows' rows stacked anew, ``H + diag(d)`` symmetrised, every iteration."""
    import daqp

    from stimsteer.control.mpc._budget_sqp import _EXCESS_TOL, _MAX_ITER, _STEP_TOL

    lo, hi = np.clip(lo, -1e30, 1e30), np.clip(hi, -1e30, 1e30)
    x, mu, lam = x0.copy(), np.zeros(windows.n), None
    for _ in range(_MAX_ITER):
        g, J = windows.excess(x)
        J = J.copy()
        L = np.diag(windows.curvature(x, mu))
        Hk = H + L
        start = {} if lam is None else {"dual_start": np.concatenate([lam, mu])}
        x_new, _f, flag, info = daqp.solve(np.ascontiguousarray(0.5 * (Hk + Hk.T)), q - L @ x,
                                           np.ascontiguousarray(np.vstack([A, J])), np.concatenate([hi, J @ x - g]),
                                           np.concatenate([lo, np.full(windows.n, -1e30)]), **start)
        assert flag >= 1
        lam, mu = info["lam"][:lo.size], np.maximum(info["lam"][lo.size:], 0.0)
        step = float(np.max(np.abs(x_new - x)))
        x = x_new
        if step <= _STEP_TOL * max(1.0, float(np.max(np.abs(x)))):
            assert np.max(windows.excess(x)[0]) <= _EXCESS_TOL
            return x, lam, mu
    raise AssertionError("did not settle")


def test_the_budget_sqp_on_its_buffers_is_the_plain_iteration_bit_for_bit():
    from stimsteer.control.mpc._budget_sqp import _Windows, solve_budgeted

    rng = np.random.default_rng(2)
    N, m = 8, 2
    b = _RollingBudget(40.0, 10, N, np.array([1.5, 2.5]))
    n_settled = 0
    for _ in range(8):
        G = rng.normal(size=(N * m, N * m))
        H = G.T @ G + 0.5 * np.eye(N * m)
        H = 0.5 * (H + H.T)
        q = -H @ rng.uniform(1.0, 4.0, N * m)
        A = np.diff(np.eye(N * m), axis=0)[::m]  # a few difference rows
        lo = np.concatenate([np.zeros(N * m), np.full(A.shape[0], -1.0)])
        hi = np.concatenate([np.full(N * m, 5.0), np.full(A.shape[0], 1.0)])
        hist = b.history(rng.uniform(0.0, 1.0, (9, m)))
        x0 = np.clip(np.linalg.solve(H, -q), 0.0, 5.0)
        got = solve_budgeted(H, q, A, lo, hi, x0, _Windows([b], [hist], N, m))
        want = _plain_sqp(H, q, A, lo, hi, x0, _Windows([b], [hist], N, m))
        assert got is not None
        for g, w in zip(got, want):
            assert np.array_equal(g, w)
        n_settled += 1
    assert n_settled == 8


@pytest.fixture(scope="module")
def budgeted_pair():
    """Two equal controllers (a budget that binds, a soft output bound), and a past to plan from."""
    from stimsteer.control.limits import StimLimits
    from stimsteer.control.mpc import ModelPredictiveController

    rng = np.random.default_rng(4)
    model = _stable_model(rng, n_outputs=2, radius=0.8)
    lim = StimLimits(amplitude_min_ua=[0.0, 0.0], amplitude_max_ua=[2.0, 2.0], slew_max_ua=[0.5, 0.5],
                     energy_budget_ua2=3.0, energy_window_steps=8, output_max=[0.5, np.inf])

    def make():
        return ModelPredictiveController(model=model, limits=lim, horizon_steps=6, input_weight=0.05).fit()

    u = rng.uniform(0.0, 0.4, size=(10, 2))
    return make(), make(), u, model.simulate(u, x0=rng.normal(size=3))


def _fields(plan):
    import dataclasses

    return {f.name: getattr(plan, f.name) for f in dataclasses.fields(plan) if f.name != "solve_time_s"}


def _same(a, b):
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (tuple, list)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    if isinstance(a, np.ndarray):
        return np.array_equal(a, b)
    return a == b


def test_plan_reports_read_late_equal_those_read_at_once_and_are_not_computed_before(budgeted_pair, monkeypatch):
    import pickle

    from stimsteer.control.mpc import condensed, model as model_module

    first, second, u, y = budgeted_pair
    calls = []
    real = condensed._condensed_terms
    monkeypatch.setattr(model_module, "_condensed_terms", lambda *a: calls.append(1) or real(*a))
    seen = []
    for target in ([9.0, 9.0], [-9.0, 9.0]):  # an output bound takes slack in the first, the budget binds in the second
        late = first.reset().plan(u, y, target=target)  # (reset: no warm start, the same numbers from both)
        assert calls == []  # no cost terms computed until they are read
        now = _fields(second.reset().plan(u, y, target=target))
        first.plan(u[::-1].copy(), y[::-1].copy(), target=[0.0, 0.0])  # another plan in between
        assert _same(_fields(late), now)
        assert len(calls) == 2  # once per plan, at its first read
        unread = second.reset().plan(u, y, target=target)
        assert _same(_fields(pickle.loads(pickle.dumps(unread))), now)
        calls.clear()
        seen.append((now["cost_terms"]["output_penalty"] > 0, now["active_limits"]["energy_budget"]))
    assert seen == [(True, False), (False, True)]


def _stable_model(rng, n_outputs, radius=0.7):
    """A random 3-state, 2-input model with spectral radius ``radius`` and no direct term."""
    from stimsteer.sysid import StateSpaceModel

    A = rng.normal(size=(3, 3))
    A *= radius / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.normal(size=(3, 2)), C=rng.normal(size=(n_outputs, 3)),
                           D=np.zeros((n_outputs, 2)), past_steps=3)


def test_the_steady_centre_is_kept_for_an_equal_target_and_read_only(monkeypatch):
    from stimsteer.control.mpc.steady import _SteadyTarget

    model = _stable_model(np.random.default_rng(8), n_outputs=2)
    kept = _SteadyTarget(model, np.eye(2), 0.1 * np.eye(2), "output", np.eye(3))
    fresh = _SteadyTarget(model, np.eye(2), 0.1 * np.eye(2), "output", np.eye(3))
    calls = []
    real = _SteadyTarget._kkt
    monkeypatch.setattr(_SteadyTarget, "_kkt", lambda self, r: calls.append(1) or real(self, r))
    for r in ([1.0, 2.0], [1.0, 2.0], [1.0, 2.0 + 1e-15], [1.0, 2.0]):
        got = kept.centre(np.array(r))
        assert np.array_equal(got, fresh._centre(np.array(r))) and not got.flags.writeable
    assert len(calls) == 3 + 4  # kept: the first, the changed and the one after it; fresh: every call


@pytest.mark.parametrize("weight", ["diagonal", "full"])
def test_the_weighted_offset_is_the_dense_product_bit_for_bit(weight):
    from stimsteer.control.limits import StimLimits
    from stimsteer.control.mpc import ModelPredictiveController

    rng = np.random.default_rng(6)
    model = _stable_model(rng, n_outputs=4)
    W = np.array([1.0, 0.3, 2.5, 0.01]) if weight == "diagonal" else (lambda G: G @ G.T + np.eye(4))(rng.normal(size=(4, 4)))
    ctrl = ModelPredictiveController(model=model, limits=StimLimits(amplitude_min_ua=[-1.0, -1.0],
                                     amplitude_max_ua=[1.0, 1.0]), horizon_steps=7, output_weight=W).fit()
    for scale in (1e-300, 1e-8, 1.0, 1e8):
        v = scale * rng.normal(size=ctrl._Lz.shape[1])
        v[::5] = 0.0
        assert np.array_equal(ctrl._weigh(v), ctrl._Lz @ v)
    assert (ctrl._Lz_diag is None) == (weight == "full")


@pytest.mark.parametrize("window, slew", [(20, [15.0, 15.0, 15.0]), (26, [15.0, np.inf, 4.0]), (8, None)])
def test_energies_and_blend_are_the_plain_formulas_bit_for_bit(window, slew):
    b = _RollingBudget(20000.0, window, 20, None if slew is None else np.array(slew))
    rng = np.random.default_rng(3)
    for _ in range(40):
        u, hist = rng.uniform(0.0, 50.0, size=(20, 3)), rng.uniform(0.0, 900.0, size=window - 1)
        want = _plain(b, u, hist)
        assert np.array_equal(b.energies(u, hist), want)
        assert np.array_equal(b.energies(u, hist, b.Mh @ hist), want)
        assert b.excess(u, hist) == float(np.max(want) - b.budget)
        assert np.array_equal(blend_all([b], [hist], u, np.zeros((20, 3))),
                              _plain_blend([b], [hist], u, np.zeros((20, 3)), energies=_plain))
