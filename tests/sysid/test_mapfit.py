"""Map-constrained identification (sysid/mapfit.py) and per-condition network figures (sysid/network/conditions)."""

import numpy as np
import pytest

from stimsteer.sysid import InvalidParameterError, Session, SessionError
from stimsteer.sysid.mapfit import MapConstrainedFit, compare_with_unconstrained
from stimsteer.sysid.network.conditions import condition_figures, trial_conditions
from stimsteer.sysid.network.maps import NetworkMap

NAMES = ("n0", "n1", "n2", "n3", "n4")


def _sparse_network(rng):
    """A stable sparse directed network on a ring with one chord, known by construction."""
    A = np.zeros((5, 5))
    for i in range(5):
        A[i, i] = rng.uniform(0.2, 0.5)
        A[(i + 1) % 5, i] = rng.uniform(0.2, 0.4)
    A[0, 2] = -0.25
    B = np.zeros((5, 2))
    B[0, 0], B[3, 1] = 1.3, 0.7
    return A, B


def _session(rng, A, B, mixing=None, n_trials=8, length=120, conditions=None, noise=0.0):
    M = np.eye(5) if mixing is None else mixing
    us, ys, trials, start = [], [], [], 0
    for t in range(n_trials):
        Ak = A if conditions is None or conditions[t] == "a" else A * 0.6
        u = rng.standard_normal((length, 2))
        x = rng.standard_normal(5)
        y = np.empty((length, M.shape[0]))
        for k in range(length):
            y[k] = M @ x + noise * rng.standard_normal(M.shape[0])
            x = Ak @ x + B @ u[k]
        us.append(u), ys.append(y), trials.append((start, start + length))
        start += length
    names = NAMES if mixing is None else tuple(f"ch{i}" for i in range(M.shape[0]))
    return Session(u=np.vstack(us), y=np.vstack(ys), sample_rate_hz=100.0, trials=trials, input_names=("s0", "s1"),
                   output_names=names)


def test_exact_data_give_back_the_sparse_network_on_its_support(rng):
    # Answer known by construction: noise-free data of a network whose A is zero off the map's support.
    A, B = _sparse_network(rng)
    net = NetworkMap(NAMES, (A != 0) * rng.uniform(0.5, 2.0, size=A.shape))  # support right, weights not
    fit = MapConstrainedFit(network_map=net, stimulated=["n0", "n3"]).fit(_session(rng, A, B))
    np.testing.assert_allclose(fit.A_[fit.support_], A[fit.support_], atol=1e-8)
    assert np.all(fit.A_[~fit.support_] == 0.0)
    np.testing.assert_allclose(fit.B_, B, atol=1e-8)
    assert fit.state_space_model().info["state_names"] == list(NAMES)


def test_known_mixtures_of_nodes_are_unmixed(rng):
    A, B = _sparse_network(rng)
    M = rng.standard_normal((6, 5))  # six channels, each a mixture of the five nodes
    fit = MapConstrainedFit(network_map=NetworkMap(NAMES, A), stimulated=["n0", "n3"], mixing=M).fit(
        _session(rng, A, B, mixing=M))
    np.testing.assert_allclose(fit.A_, A, atol=1e-8)
    np.testing.assert_allclose(fit.model_.C, M)


def test_shrink_pulls_the_weights_toward_the_map(rng):
    A, B = _sparse_network(rng)
    session = _session(rng, A, B, noise=0.3)
    prior = NetworkMap(NAMES, A * 1.5)
    free = MapConstrainedFit(network_map=prior, stimulated=["n0", "n3"]).fit(session)
    pulled = MapConstrainedFit(network_map=prior, stimulated=["n0", "n3"], shrink=1e3).fit(session)
    mask = free.support_
    assert np.linalg.norm(pulled.A_[mask] - 1.5 * A[mask]) < 0.01 * np.linalg.norm(free.A_[mask] - 1.5 * A[mask])


def test_held_out_scores_compare_with_the_unconstrained_fit_of_the_same_order(rng):
    A, B = _sparse_network(rng)
    session = _session(rng, A, B, noise=0.05, n_trials=6, length=60)
    fit, scores = compare_with_unconstrained(session, NetworkMap(NAMES, A), ["n0", "n3"], seed=3)
    table = scores.table.set_index("fit")
    assert table.loc["map-constrained", "free_parameters"] == int((A != 0).sum() + np.eye(5).sum() - 5) + 2
    assert table.loc["unconstrained (same order)", "free_parameters"] == 25 + 10
    assert table.loc["map-constrained", "one_step_r2"] > 0.9
    assert len(scores.test_trials) == 2 and scores.seed == 3
    # the true support generalises at least as well as 35 free parameters fitted to noisy data
    assert table.loc["map-constrained", "free_run_r2"] >= table.loc["unconstrained (same order)", "free_run_r2"] - 0.02


def test_map_fit_bad_inputs(rng):
    A, B = _sparse_network(rng)
    session = _session(rng, A, B, n_trials=2, length=30)
    net = NetworkMap(NAMES, A)
    with pytest.raises(InvalidParameterError, match="one stimulated node per session input"):
        MapConstrainedFit(network_map=net, stimulated=["n0"]).fit(session)
    with pytest.raises(InvalidParameterError, match="unknown node 'zz'"):
        MapConstrainedFit(network_map=net, stimulated=["n0", "zz"]).fit(session)
    with pytest.raises(InvalidParameterError, match="rank 4 < 5 nodes"):
        MapConstrainedFit(network_map=net, stimulated=["n0", "n1"], mixing=np.eye(5)[:4]).fit(
            session.replace(y=session.y[:, :4], output_names=NAMES[:4], output_units=None))
    with pytest.raises(SessionError, match="nodes not recorded: \\['n4'\\]"):
        MapConstrainedFit(network_map=net, stimulated=["n0", "n1"]).fit(
            session.replace(y=session.y[:, :4], output_names=NAMES[:4], output_units=None))
    with pytest.raises(InvalidParameterError, match="shrink must be"):
        MapConstrainedFit(network_map=net, stimulated=["n0", "n1"], shrink=-1).fit(session)


# ------------------------------------------------------------------------------------------------ conditions
def test_condition_figures_find_a_real_difference_and_not_a_null_one(rng):
    A, B = _sparse_network(rng)
    labels = ["a", "b"] * 6
    session = _session(rng, A, B, n_trials=12, length=80, conditions=labels, noise=0.02)
    net = NetworkMap(NAMES, A)

    def fit(s):
        return MapConstrainedFit(network_map=net, stimulated=["n0", "n3"]).fit(s).model_

    res = condition_figures(session, fit, labels=labels, n_boot=30, seed=1).table
    diff = res[(res.condition == "b - a") & (res.figure == "h2_squared")]
    # condition b scales A by 0.6: weaker recurrence, smaller H2 norm, interval excluding zero (by construction)
    assert np.all(diff.estimate < 0) and np.all(diff.ci_high < 0)
    same = condition_figures(session, fit, labels=["a"] * 6 + ["b"] * 6, n_boot=30, seed=1).table
    assert set(same.figure) == {"h2_squared", "average_controllability"}
    assert np.all(same.ci_low <= same.estimate) and np.all(same.estimate <= same.ci_high)


def test_conditions_come_from_the_session_metadata(rng):
    A, B = _sparse_network(rng)
    session = _session(rng, A, B, n_trials=4, length=30)
    with pytest.raises(SessionError, match="has no condition labels"):
        trial_conditions(session)
    labelled = session.replace(metadata={"trial_conditions": ["x", "y", "x", "y"]})
    assert trial_conditions(labelled) == ("x", "y", "x", "y")
    with pytest.raises(SessionError, match="the session has 4 trials and 3 labels were given"):
        trial_conditions(session, ["x", "y", "x"])
    with pytest.raises(SessionError, match="condition 'z' has 1 trial"):
        trial_conditions(session, ["x", "x", "x", "z"])
