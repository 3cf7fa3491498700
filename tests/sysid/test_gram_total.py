"""Large folds' held-out terms from the total Gram's Cholesky factor (``gram._heldout_from_total``,
``gram._fold_error_from_total``): the same numbers as the validation fold's own Gram, which they replace above
``gram.TOTAL_FACTOR_ROWS`` regressor rows. Reference: the validation-Gram route of before (kept below the limit)."""

from __future__ import annotations

import numpy as np
import pytest

from stimsteer.sysid.datadriven import _by_strength as bs
from stimsteer.sysid.datadriven import _eigen_folds as ef
from stimsteer.sysid.datadriven import gram as gr
from stimsteer.sysid.datadriven.hankel_predictor import HankelPredictor
from stimsteer.sysid.datadriven.lsq import LsqPredictor
from tests.sysid.simulated import state_space_session


def _system(T=3000, noise=0.1, seed=4):
    """A stable 3-state, 2-input, 3-output system in four trials; measurement noise ``noise``."""
    rng = np.random.default_rng(seed)
    return _driven(rng.standard_normal((T, 2)), noise, rng)


def _driven(u, noise, rng):
    """The session of the system of :func:`_system` driven by ``u`` (its ``B`` and noise drawn from ``rng``)."""
    A, B = np.diag([0.8, 0.5, -0.3]), rng.standard_normal((3, 2))
    return state_space_session(u, A, B, noise=noise, rng=rng)


@pytest.fixture(scope="module")
def folds():
    m, p, past, horizon = 2, 3, 4, 6
    pieces = [(0, 750, 0), (750, 1500, 1), (1500, 2250, 2), (2250, 3000, 0)]
    fs, *_ = gr.collect_gram(_system(), pieces, 3, m, p, past, horizon)
    total = gr.total_fold(fs)
    assert gr.gram_condition_of(total, keep=True) < gr.GRAM_CONDITION_LIMIT
    return fs, total, (m + p) * past + m * horizon


@pytest.mark.parametrize("by_strength", [False, True])
@pytest.mark.parametrize("i", [0, 1, 2])
def test_ridge_grid_from_the_total_factor_equals_the_validation_gram_route(folds, i, by_strength, monkeypatch):
    fs, total, n_b = folds
    train, val = total.plus(fs[i], -1.0), fs[i]
    alphas, w = np.logspace(-8, 0, 9), np.linspace(0.5, 2.0, 18)
    old = gr.ridge_grid_errors(train, val, n_b, alphas, w, total)  # n_b = 20 < the limit: the validation Gram
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    monkeypatch.setattr(gr, "FOLDS_SIDE_BY_SIDE", False)  # fold by fold (the folds side by side: tests below)
    monkeypatch.setattr(gr, "BY_STRENGTH", by_strength)  # one eigendecomposition, or a Cholesky per strength
    new = gr.ridge_grid_errors(train, val, n_b, alphas, w, total)
    np.testing.assert_allclose(new, old, rtol=1e-10)
    assert not np.array_equal(new, old)  # the other route was taken (it rounds differently)


@pytest.mark.parametrize("i", [0, 1, 2])
def test_unregularised_fold_error_from_the_total_factor_equals_its_definition(folds, i, monkeypatch):
    fs, total, n_b = folds
    train, val = total.plus(fs[i], -1.0), fs[i]
    w = np.linspace(0.5, 2.0, 18)
    Gt, Gv = train.gram, val.gram
    theta = np.linalg.solve(Gt[:n_b, :n_b], Gt[:n_b, n_b:]).T  # the definition, from both Grams
    R = Gv[n_b:, n_b:] - theta @ Gv[:n_b, n_b:] - Gv[n_b:, :n_b] @ theta.T + theta @ Gv[:n_b, :n_b] @ theta.T
    expected = float(w ** 2 @ np.diagonal(R))
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    assert gr.unregularised_fold_error(train, val, n_b, w, total) == pytest.approx(expected, rel=1e-10)


def test_without_a_factor_the_validation_gram_is_used(folds, monkeypatch):
    fs, total, n_b = folds
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    assert gr._total_factor(None, n_b) is None
    assert gr._total_factor(gr.total_fold(fs), n_b) is None  # a sum not factored by the condition check
    assert gr._total_factor(total, n_b) is total._factor


def test_the_kept_gram_gives_the_final_map_without_a_second_assembly(folds, monkeypatch):
    fs, total, n_b = folds
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    part = gr.total_fold(fs)
    G = part.gram  # the assembled Gram (a fresh array: the condition check factors its own)
    assert gr.gram_condition_of(part, keep_gram=True) == gr.gram_condition_of(gr.total_fold(fs))
    F = gr._total_factor(part, n_b)  # what the least-squares predictor keeps: the factor and G's upper triangle
    assert F is part._factor_gram and part._factor is None
    np.testing.assert_array_equal(np.tril(F), total._factor)  # the factor, as the condition check always made it
    np.testing.assert_array_equal(np.triu(F, 1), np.triu(G, 1))  # the Gram's own entries, untouched
    calls = []
    monkeypatch.setattr(gr, "_lagged_gram", lambda *a, **k: calls.append(1))
    theta, scale = gr.fitted_ridge_map(part, n_b, 1e-3)
    assert not calls  # no Gram assembled again
    assert scale == pytest.approx(np.trace(G) / G.shape[0], rel=1e-14)
    np.testing.assert_array_equal(theta, gr.ridge_map(G, n_b, 1e-3 * scale))  # bit for bit (G is symmetric)
    assert part._factor_gram is None  # released after the map
    # the held-out terms read only the lower triangle: the same numbers as from the clean factor
    X = np.random.default_rng(3).standard_normal((n_b, 4))
    np.testing.assert_array_equal(gr._lower_t_times(F, n_b, X.copy(), block=7),
                                  gr._lower_t_times(total._factor, n_b, X.copy(), block=7))


def test_small_fits_take_the_final_map_from_the_kept_gram_bit_for_bit(folds, monkeypatch):
    fs, _total, n_b = folds  # n_b = 20, below TOTAL_FACTOR_ROWS: the golden demo's sizes
    part = gr.total_fold(fs)
    G = part.gram
    gr.gram_condition_of(part, keep_gram=True)
    calls = []
    monkeypatch.setattr(gr, "_lagged_gram", lambda *a, **k: calls.append(1))
    theta, scale = gr.fitted_ridge_map(part, n_b, 1e-3)
    assert not calls  # no Gram assembled again
    assert scale == np.trace(G) / G.shape[0]  # what the small fits computed before, bit for bit
    np.testing.assert_array_equal(theta, gr.ridge_map(G, n_b, 1e-3 * scale))


@pytest.mark.parametrize("cls", [LsqPredictor, HankelPredictor])
def test_predictors_fitted_through_the_total_factor_predict_as_before(cls, monkeypatch):
    s, P, N = _system(), 5, 8
    old = cls(past_steps=P, horizon_steps=N).fit(s)
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    calls = []
    for module, name in ((gr, "_grid_by_strength"), (gr, "_fold_error_from_total"), (ef, "eigen_fold_errors")):
        def counted(*a, _f=getattr(module, name), **k):
            calls.append(_f)
            return _f(*a, **k)

        monkeypatch.setattr(module, name, counted)
    new = cls(past_steps=P, horizon_steps=N).fit(s)
    assert len(calls) == 3  # one per fold: the total's factor reached the held-out terms
    assert new.factor_route_ == old.factor_route_ == "gram"
    assert getattr(new, "alpha_", None) == getattr(old, "alpha_", None)  # SPC: the same strength chosen
    rng = np.random.default_rng(5)
    windows = rng.standard_normal((6, P, 2)), rng.standard_normal((6, P, 3)), rng.standard_normal((6, N, 2))
    a, b = old.predict_many(*windows), new.predict_many(*windows)
    assert np.abs(a - b).max() <= 1e-10 * np.abs(a).max()
    for col in [c for c in old.cv_table_.columns if c != "candidate"]:
        np.testing.assert_allclose(new.cv_table_[col], old.cv_table_[col], rtol=1e-10)


def _grid_case(folds, k: int):
    """Fold ``k``'s training Gram, its validation fold, the output weights, nine strengths and the constant term
    (18 weights: the fixture's ``pN`` outputs; strengths 1e-8 to 1 times the mean diagonal: a grid of the kind the
    fit scores, chosen to span well- and strongly-regularised systems)."""
    fs, total, n_b = folds
    val = fs[k]
    G = total.plus(val, -1.0).gram
    w = np.linspace(0.5, 2.0, 18)
    s = np.trace(G) / G.shape[0] * np.logspace(-8, 0, 9)
    return G, val, w, s, float(w ** 2 @ np.diagonal(val.gram)[n_b:]), total, n_b


def test_strengths_scored_side_by_side_equal_one_at_a_time_and_reuse_their_arrays(folds):
    G, val, w, s, c0, total, n_b = _grid_case(folds, 1)
    # reference: the definition of the held-out error below; one worker against two: an internal equivalence
    rows = np.asfortranarray(G[:n_b])  # [G11 G12], Fortran-ordered (worked on in place)
    one = bs.strength_errors(rows, total._factor, s, c0, w, workers=1)  # one array reused 9 times
    two = bs.strength_errors(np.asfortranarray(G[:n_b]), total._factor, s, c0, w, workers=2)
    np.testing.assert_array_equal(two, one)  # each strength computes the same numbers on whichever worker
    # the definition at each strength, from both Grams (validation Gram = total − training)
    Gv = val.gram
    for k, sk in enumerate(s):
        theta = np.linalg.solve(G[:n_b, :n_b] + sk * np.eye(n_b), G[:n_b, n_b:]).T
        R = Gv[n_b:, n_b:] - theta @ Gv[:n_b, n_b:] - Gv[n_b:, :n_b] @ theta.T + theta @ Gv[:n_b, :n_b] @ theta.T
        assert one[k] == pytest.approx(float(w ** 2 @ np.diagonal(R)), rel=1e-9)
    np.testing.assert_array_equal(rows[:, n_b:], G[:n_b, n_b:])  # G12 not modified
    np.testing.assert_array_equal(np.triu(rows[:, :n_b], 1), np.triu(G[:n_b, :n_b], 1))  # nor G11 above the diagonal
    # strength -1e9: far below minus the largest eigenvalue of G11, so G11 + sI is not positive definite
    assert bs.strength_errors(np.asfortranarray(G[:n_b]), total._factor, [-1e9], c0, w) is None  # not PD


def test_right_hand_sides_in_blocks_agree_with_whole_ones_to_rounding(folds, monkeypatch):
    """Summing the squares a block of right-hand sides at a time (issue 14: memory) changes only the rounding of the
    sums: against one block of all of them, 1e-12 relative (2.3e-13 measured on the fit at past 100 / horizon 50)."""
    G, _val, w, s, c0, total, n_b = _grid_case(folds, 0)
    whole = bs.strength_errors(np.asfortranarray(G[:n_b]), total._factor, s, c0, w)
    monkeypatch.setattr(bs, "RHS_BLOCK", 5)  # 18 right-hand sides in blocks of 5, 5, 5, 3
    np.testing.assert_allclose(bs.strength_errors(np.asfortranarray(G[:n_b]), total._factor, s, c0, w), whole,
                               rtol=1e-12)


def test_the_strength_grid_adds_one_matrix_and_blocks_of_right_hand_sides(monkeypatch):
    """Memory (issue 14): beyond the caller's training rows and total factor, at most one ``n_b × n_b`` array (the
    second worker's factor) and two blocks of ``RHS_BLOCK`` right-hand sides, or the ``2 n_b pN`` of the data
    term's transient, plus each worker's block temporaries (a 256-column triangle's indices and values, ``n_b × 64``
    of ``L21ᵀ Ω``) and 64 kB; no copy of ``G11`` per worker, of ``G12 Ω`` or of ``L21ᵀ Ω`` (those took
    ``n_b² + 4 n_b pN`` more: here 10 MB over a 7.5 MB bound). Reference: the arrays' sizes (tracemalloc counts
    NumPy's allocations)."""
    import tracemalloc

    rng = np.random.default_rng(0)
    n_b, pN = 800, 400  # chosen large enough that the arrays' sizes dominate tracemalloc's small objects
    X = rng.standard_normal((n_b + pN, 3 * (n_b + pN)))  # 3 times more columns than rows: G positive definite
    G = X @ X.T
    F = np.linalg.cholesky(G).copy(order="F")
    Gt = np.asfortranarray(0.7 * G[:n_b])  # a training Gram's rows (any positive definite G11)
    monkeypatch.setattr(bs, "RHS_BLOCK", 32)  # 32 of the 400 right-hand sides: several blocks, small ones
    w, s = np.linspace(0.5, 2.0, pN), np.trace(G) / G.shape[0] * np.logspace(-8, 0, 9)
    tracemalloc.start()
    try:
        errors = bs.strength_errors(Gt, F, s, 1.0, w, workers=2)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert errors is not None
    # the bound of the docstring in bytes (8 per float64): per worker a 256-column triangle's values and two index
    # arrays (3 × 256·255/2) and n_b × 64 of L21ᵀ Ω; 65536: 64 kB for small Python objects (the author's margin)
    per_worker = 8 * (3 * 256 * 255 // 2 + n_b * 64)
    assert peak <= 8 * max(n_b * n_b + 2 * n_b * 32, 2 * n_b * pN) + 2 * per_worker + 65536


def test_a_reused_array_gets_its_matrix_back_after_the_factorisation():
    rng = np.random.default_rng(2)
    X = rng.standard_normal((300, 300))
    G = np.asfortranarray(X @ X.T + 300 * np.eye(300))
    K = G.copy(order="F")
    assert bs._potrf_lower(K) == 0
    np.testing.assert_allclose(np.tril(K) @ np.tril(K).T, G, rtol=1e-12, atol=1e-9)  # the factor, in place
    bs._restore_lower(K, np.diagonal(G) + 0.0, block=64)
    np.testing.assert_array_equal(K, G)


def test_where_a_strength_cannot_be_factored_the_eigen_route_scores_the_fold(folds, monkeypatch):
    fs, total, n_b = folds
    train, val = total.plus(fs[2], -1.0), fs[2]
    alphas, w = np.logspace(-8, 0, 9), np.linspace(0.5, 2.0, 18)
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    monkeypatch.setattr(gr, "FOLDS_SIDE_BY_SIDE", False)
    monkeypatch.setattr(gr, "BY_STRENGTH", False)
    eigen = gr.ridge_grid_errors(train, val, n_b, alphas, w, total)
    monkeypatch.setattr(gr, "BY_STRENGTH", True)
    monkeypatch.setattr(gr, "strength_errors", lambda *a: None)
    np.testing.assert_array_equal(gr.ridge_grid_errors(train, val, n_b, alphas, w, total), eigen)


def _one_signed(mean=10.0, T=4000, noise=0.1, seed=0):
    """The system of :func:`_system` driven by one-signed inputs (``mean`` + |N(0, 1)|), as pulse amplitudes are:
    a Gram route accepted near its condition limit."""
    rng = np.random.default_rng(seed)
    return _driven(mean + np.abs(rng.standard_normal((T, 2))), noise, rng)


@pytest.mark.parametrize("cls", [LsqPredictor, HankelPredictor])
def test_total_factor_route_near_the_condition_limit_predicts_as_the_qr_route(cls, monkeypatch):
    # The differences of the held-out terms lose about half a digit more than the validation Gram's own terms
    # (gram._heldout_from_total): at an estimated condition of ~1e8 the predictions still agree with the QR
    # route's to the Gram route's stated tolerance (eps·κ ≈ 1e-8; Golub & Van Loan 2013, section 5.3.8).
    s, P, N = _one_signed(), 5, 8
    qr = cls(past_steps=P, horizon_steps=N)
    qr._route = "qr"  # test hook of the direct predictors: the QR route whatever the conditioning
    qr.fit(s)
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    new = cls(past_steps=P, horizon_steps=N).fit(s)
    assert new.factor_route_ == "gram" and 1e7 < new.gram_condition_ < gr.GRAM_CONDITION_LIMIT
    rng = np.random.default_rng(5)
    windows = (10.0 + np.abs(rng.standard_normal((6, P, 2))), rng.standard_normal((6, P, 3)),
               10.0 + np.abs(rng.standard_normal((6, N, 2))))
    a, b = qr.predict_many(*windows), new.predict_many(*windows)
    assert np.abs(a - b).max() <= 1e-8 * np.abs(a).max()
    assert new.cv_table_["candidate"][new.cv_table_["validation_error"].idxmin()] == \
        qr.cv_table_["candidate"][qr.cv_table_["validation_error"].idxmin()]


def test_plan_gaps_by_lanczos_equal_the_dense_largest_eigenvalue(monkeypatch):
    from stimsteer.sysid.datadriven import consistency as cs

    rng = np.random.default_rng(8)
    theta_y, yf2, lambdas = rng.standard_normal((40, 60)), rng.standard_normal((40, 30)), np.logspace(-6, 0, 7)
    dense = cs.plan_gaps_coordinate(theta_y, yf2, lambdas, 0.5)  # 40 rows < LANCZOS_ROWS: the dense reduction
    # the definition: the largest eigenvalue of Θ_Y Θ_Yᵀ / λ_y + Yf2 Yf2ᵀ / λ_g (numpy's full spectrum)
    expected = [np.linalg.eigvalsh(theta_y @ theta_y.T / 0.5 + yf2 @ yf2.T / lam)[-1] for lam in lambdas]
    np.testing.assert_allclose(dense, expected, rtol=1e-12)
    monkeypatch.setattr(cs, "LANCZOS_ROWS", 1)
    np.testing.assert_allclose(cs.plan_gaps_coordinate(theta_y, yf2, lambdas, 0.5), expected, rtol=1e-12)
    monkeypatch.setattr(cs, "_largest_eigenvalue", lambda H: None)  # no convergence: the dense reduction
    np.testing.assert_array_equal(cs.plan_gaps_coordinate(theta_y, yf2, lambdas, 0.5), dense)


def test_small_folds_take_their_training_rows_from_the_kept_gram(folds, monkeypatch):
    # Small problems (the golden demo's sizes): a fold's training rows are the kept total Gram's minus the
    # validation rows, so one Gram is assembled per fold instead of two. The reference is the training sums'
    # own Gram (the route of before): the same data differenced before the assembly instead of after it.
    fs, _total, n_b = folds
    part = gr.total_fold(fs)
    gr.gram_condition_of(part, keep_gram=True)
    train, val = part.plus(fs[0], -1.0), fs[0]
    expected = train.gram_rows(0, n_b)
    got = gr._training_rows(part, val.gram_rows(0, n_b), n_b)
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-13 * np.abs(expected).max())
    alphas, w = np.logspace(-8, 0, 9), np.linspace(0.5, 2.0, 18)
    old = gr.ridge_grid_errors(train, val, n_b, alphas, w, None)  # no kept Gram: both Grams assembled
    calls = []
    monkeypatch.setattr(gr, "_lagged_gram", lambda *a, _f=gr._lagged_gram, **k: calls.append(1) or _f(*a, **k))
    new = gr.ridge_grid_errors(train, val, n_b, alphas, w, part)
    assert len(calls) == 1  # the validation rows only
    np.testing.assert_allclose(new, old, rtol=1e-11)


def test_small_lsq_fits_assemble_one_gram_per_fold_and_predict_as_before(monkeypatch):
    from stimsteer.sysid.datadriven import lsq

    s, P, N = _system(T=1200), 3, 4
    calls = []
    monkeypatch.setattr(gr, "_lagged_gram", lambda *a, _f=gr._lagged_gram, **k: calls.append(1) or _f(*a, **k))
    new = LsqPredictor(past_steps=P, horizon_steps=N).fit(s)
    assert len(calls) == 4  # the total (condition check and final map) and each fold's validation rows
    grid = lsq.ridge_grid_errors  # without the total: both Grams of each fold assembled, as before
    monkeypatch.setattr(lsq, "ridge_grid_errors", lambda *a: grid(*a[:-1], None))
    calls.clear()
    old = LsqPredictor(past_steps=P, horizon_steps=N).fit(s)
    assert len(calls) == 7
    assert new.alpha_ == old.alpha_
    np.testing.assert_array_equal(new.Kp_, old.Kp_)  # the final map is the kept total Gram's either way
    np.testing.assert_array_equal(new.Kf_, old.Kf_)
    for col in [c for c in old.cv_table_.columns if c != "candidate"]:
        np.testing.assert_allclose(new.cv_table_[col], old.cv_table_[col], rtol=1e-11)


def test_small_hankel_folds_score_from_the_total_factor_without_a_validation_gram(monkeypatch):
    # The unregularised fold error takes its held-out terms from the total's factor at every size: on the demo's
    # small problems the validation Gram's assembly was half of each fold's. The reference is the validation
    # Gram's own terms (the route of before below TOTAL_FACTOR_ROWS), equal to rounding.
    s, P, N = _system(T=1200), 3, 4
    calls, routes = [], []
    monkeypatch.setattr(gr, "_lagged_gram", lambda *a, _f=gr._lagged_gram, **k: calls.append(1) or _f(*a, **k))
    monkeypatch.setattr(gr, "_fold_error_from_total",
                        lambda *a, _f=gr._fold_error_from_total, **k: routes.append(1) or _f(*a, **k))
    new = HankelPredictor(past_steps=P, horizon_steps=N).fit(s)
    n_new = len(calls)
    assert len(routes) == 3  # every fold from the total's factor (n_b = 21, far below TOTAL_FACTOR_ROWS)
    factor = gr._total_factor
    monkeypatch.setattr(gr, "_total_factor", lambda total, n_b, any_size=False: factor(total, n_b))
    calls.clear()
    old = HankelPredictor(past_steps=P, horizon_steps=N).fit(s)
    assert len(calls) == n_new + 3  # one validation Gram per fold fewer
    assert old.cv_table_.shape == new.cv_table_.shape
    for col in [c for c in old.cv_table_.columns if c != "candidate"]:
        np.testing.assert_allclose(new.cv_table_[col], old.cv_table_[col], rtol=1e-11)
    rng = np.random.default_rng(6)
    windows = rng.standard_normal((4, P, 2)), rng.standard_normal((4, P, 3)), rng.standard_normal((4, N, 2))
    np.testing.assert_array_equal(new.predict_many(*windows), old.predict_many(*windows))


# ------------------------------------------------------------------------------------------------ folds side by side
def _factored_total(fs):
    """A fresh sum of the folds with the condition check's factor (no grid kept from another test)."""
    total = gr.total_fold(fs)
    gr.gram_condition_of(total, keep=True)
    return total


def _numpy_reference(train, val, n_b, strengths, w):
    """Plain NumPy reference (the definition; common practice, no source): ``Θ(s) = G21 (G11 + s I)⁻¹`` by
    ``numpy.linalg.solve`` from the training Gram, and ``Σ_k w_k² (G22v − Θ G12v − G21v Θᵀ + Θ G11v Θᵀ)_kk``
    from the validation fold's own Gram."""
    G, Gv = train.gram, val.gram
    out = []
    for s in strengths:
        theta = np.linalg.solve(G[:n_b, :n_b] + s * np.eye(n_b), G[:n_b, n_b:]).T
        R = Gv[n_b:, n_b:] - theta @ Gv[:n_b, n_b:] - Gv[n_b:, :n_b] @ theta.T + theta @ Gv[:n_b, :n_b] @ theta.T
        out.append(float(w ** 2 @ np.diagonal(R)))
    return np.asarray(out)


def _grids(fs, n_b, alphas, w):
    total = _factored_total(fs)
    return total, [gr.ridge_grid_errors(total.plus(f, -1.0), f, n_b, alphas, w, total) for f in fs]


@pytest.mark.parametrize("block", [256, 7])  # one block, and several (n_b = 20, pN = 18)
def test_folds_side_by_side_equal_the_fold_by_fold_route_and_a_plain_numpy_reference(folds, block, monkeypatch):
    fs, _total, n_b = folds
    alphas, w = np.logspace(-8, 0, 9), np.linspace(0.5, 2.0, 18)
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    monkeypatch.setattr(ef, "BLOCK", block)
    calls = []
    for module, name in ((gr, "_grid_by_strength"), (ef, "eigen_fold_errors")):
        monkeypatch.setattr(module, name, lambda *a, _f=getattr(module, name), _n=name: calls.append(_n) or _f(*a))
    total, new = _grids(fs, n_b, alphas, w)
    assert sorted(calls) == ["_grid_by_strength", "eigen_fold_errors", "eigen_fold_errors"]  # all at the first call
    monkeypatch.setattr(gr, "FOLDS_SIDE_BY_SIDE", False)
    _t, old = _grids(fs, n_b, alphas, w)  # fold by fold, one Cholesky factor per strength (the route of before)
    for f, a, b in zip(fs, new, old):
        np.testing.assert_allclose(a, b, rtol=1e-10)
        scale = float(total.plus(f, -1.0).gram_diagonal().sum()) / f.n_rows
        np.testing.assert_allclose(a, _numpy_reference(total.plus(f, -1.0), f, n_b, alphas * scale, w), rtol=1e-9)
    assert not np.array_equal(new[0], old[0]) and not np.array_equal(new[1], old[1])  # eigendecompositions
    np.testing.assert_array_equal(new[2], old[2])  # the third fold by strength, as before


def test_folds_the_eigen_route_cannot_score_are_scored_fold_by_fold(folds, monkeypatch):
    fs, _total, n_b = folds
    alphas, w = np.logspace(-8, 0, 9), np.linspace(0.5, 2.0, 18)
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    monkeypatch.setattr(gr, "FOLDS_SIDE_BY_SIDE", False)
    _t, by_strength = _grids(fs, n_b, alphas, w)
    monkeypatch.setattr(gr, "BY_STRENGTH", False)
    _t, eigen = _grids(fs, n_b, alphas, w)
    monkeypatch.setattr(gr, "BY_STRENGTH", True)
    monkeypatch.setattr(gr, "FOLDS_SIDE_BY_SIDE", True)
    monkeypatch.setattr(ef, "eigh_lower", lambda *a: None)  # LAPACK's eigenvalue routine failed
    _t, got = _grids(fs, n_b, alphas, w)
    for a, b in zip(got, by_strength):
        np.testing.assert_array_equal(a, b)
    monkeypatch.undo()
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    monkeypatch.setattr(ef, "MAX_BYTES", 2 * 8 * n_b * (fs[0].n_rows + n_b) - 1)  # two folds' arrays: too large
    _t, got = _grids(fs, n_b, alphas, w)
    for a, b in zip(got, by_strength):
        np.testing.assert_array_equal(a, b)  # fold by fold
    monkeypatch.undo()
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    monkeypatch.setattr(gr, "strength_errors", lambda *a: None)  # some G11 + sI of the third fold not definite
    _t, got = _grids(fs, n_b, alphas, w)
    np.testing.assert_array_equal(got[2], eigen[2])  # the eigen route of before, as fold by fold
    np.testing.assert_allclose(got[0], eigen[0], rtol=1e-10)


def test_lsq_fits_with_the_folds_side_by_side_predict_as_fold_by_fold(monkeypatch):
    s, P, N = _system(), 5, 8
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    monkeypatch.setattr(gr, "FOLDS_SIDE_BY_SIDE", False)
    old = LsqPredictor(past_steps=P, horizon_steps=N).fit(s)
    monkeypatch.setattr(gr, "FOLDS_SIDE_BY_SIDE", True)
    new = LsqPredictor(past_steps=P, horizon_steps=N).fit(s)
    assert new.alpha_ == old.alpha_
    np.testing.assert_array_equal(new.Kp_, old.Kp_)  # the final map is not changed: bit for bit
    np.testing.assert_array_equal(new.Kf_, old.Kf_)
    for col in [c for c in old.cv_table_.columns if c != "candidate"]:
        np.testing.assert_allclose(new.cv_table_[col], old.cv_table_[col], rtol=1e-10)


@pytest.mark.parametrize("small", [True, False])
def test_rows_assembled_fortran_ordered_equal_the_rows(folds, small, monkeypatch):
    """``gram_rows(..., fortran=True)`` (the strength grid's rows, issue 14): the numbers of the C-ordered rows, bit
    for bit (reference: the Gram's own rows; the Gram is exactly symmetric), by the strided copies and by the
    short vectors' path."""
    from stimsteer.sysid import _lagged

    if not small:
        monkeypatch.setattr(_lagged, "_SMALL_ASSEMBLY", 0)
    fs, total, n_b = folds
    train = total.plus(fs[1], -1.0)
    for r0, r1 in ((0, n_b), (3, 17)):  # the grid's rows, and an inner block not starting at 0
        rows = train.gram_rows(r0, r1, fortran=True)
        assert rows.flags.f_contiguous
        np.testing.assert_array_equal(rows, train.gram_rows(r0, r1))
        np.testing.assert_array_equal(rows, train.gram[r0:r1])


def test_spc_fit_holding_only_the_factor_columns_it_reads_predicts_bit_for_bit(monkeypatch):
    """Issue 14 (memory): from ``TOTAL_FACTOR_ROWS`` regressor rows the SPC fit keeps only the first ``n_b``
    columns of the total's factor through the cross-validation and assembles ``G12`` again for the final map: the
    same map, table and predictions, bit for bit, as with the whole factor kept (reference: that fit)."""
    from stimsteer.sysid.datadriven import lsq

    s, P, N = _system(), 5, 8  # past 5, horizon 8: chosen for speed
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)  # 1 row: the small session takes the large fits' route
    seen = []
    real = gr.ridge_grid_errors
    monkeypatch.setattr(lsq, "ridge_grid_errors", lambda *a: seen.append(a[-1]._factor_gram.shape) or real(*a))
    new = LsqPredictor(past_steps=P, horizon_steps=N).fit(s)
    n_b, n = 5 * P + 2 * N, 5 * (P + N)  # 2 inputs + 3 outputs in the past, 2 inputs in the future; all 5 in both
    assert seen == [(n, n_b)] * 3  # the compact factor reached every fold (3: n_splits' default)
    monkeypatch.setattr(lsq, "_compact_kept_factor", lambda *a: None)
    old = LsqPredictor(past_steps=P, horizon_steps=N).fit(s)
    np.testing.assert_array_equal(np.hstack([new.Kp_, new.Kf_]), np.hstack([old.Kp_, old.Kf_]))
    np.testing.assert_array_equal(new.cv_table_.to_numpy(), old.cv_table_.to_numpy())
