"""Input recruitment: a static monotone nonlinearity per stimulation site before linear dynamics (Hammerstein).

``v_i = f_i(u_i)`` (a piecewise-linear monotone map through ``n_knots`` knots spanning the training amplitudes,
``f_i(0) = 0``, unit mean slope so ``v`` stays in the amplitude's units), then a ridge ARX model from ``v`` to ``y``.

Fit (over-parametrised two-step method of Bai 1998): regress ``y_t`` on its past and on the hat-basis values
``h_j(u_{t−i})`` of the inputs by ridge; per site the coefficient block ``Θ_i`` (lags·outputs × knots) is close to
the rank-one product ``b wᵀ`` of the linear part's input coefficients and the knot values, so its leading singular
vector gives the knot values. A map whose values fall by more than ``monotone_tolerance`` of their range is
**non-monotone**: it is kept for prediction, reported in ``selection_notes_`` and refused by the planner; smaller
falls are noise and are removed by pooling adjacent violators (isotonic regression). The linear part is then a
:class:`~stimsteer.sysid.arx.RidgeArx` fitted (with its own cross-validation) on the session with ``v`` in place
of ``u``.

Planning (:class:`~stimsteer.sysid.protocols.RecruitmentForm`) is convex in ``v`` with the amplitude window mapped
through the monotone ``f`` and the plan decoded back to amplitudes by ``f⁻¹``.

References
----------
Bai E.-W. (1998), An optimal two-stage identification algorithm for Hammerstein–Wiener nonlinear systems,
Automatica 34(3):333–338.
Barlow R. E. et al. (1972), Statistical inference under order restrictions (pool adjacent violators).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.linalg as sla

from ._base import BasePredictor, check_fitted
from .arx import RidgeArx
from .exceptions import InvalidParameterError, SessionError

__all__ = ["HammersteinArx", "Recruitment"]

#: Entries of the over-parametrised lagged design (rows × columns) above which a regularised fit streams its normal
#: equations instead of building the design (2²⁴ entries: 128 MB).
_DESIGN_MAX = 1 << 24


def _hat(u: np.ndarray, knots: np.ndarray) -> np.ndarray:
    """Hat basis (piecewise-linear interpolation weights) of values ``u`` (n,) on ``knots`` (K,), shape (n, K)."""
    K = knots.size
    eye = np.eye(K)
    return np.stack([np.interp(u, knots, eye[j]) for j in range(K)], axis=1)


def _hat_channels(u: np.ndarray, knots: np.ndarray) -> np.ndarray:
    """The inputs ``u`` (n, m) in the hat basis of each site's knots less its value at zero, shape (n, m·K): site by
    site, knot by knot."""
    return np.hstack([_hat(u[:, i], knots[i]) - _hat(np.zeros(1), knots[i]) for i in range(u.shape[1])])


def _site_blocks(coef: np.ndarray, L: int, m: int, K: int, p: int) -> np.ndarray:
    """Input coefficients ``(L·m·K, p)`` (lag by lag, then site, knot) as the per-site blocks, shape (L·p, m, K)."""
    return np.transpose(coef.reshape(L, m, K, p), (0, 3, 1, 2)).reshape(L * p, m, K)


def _pava(v: np.ndarray) -> np.ndarray:
    """Nondecreasing least-squares fit of ``v`` (pool adjacent violators, equal weights)."""
    blocks = []
    for x in v:
        blocks.append([float(x), 1])
        while len(blocks) > 1 and blocks[-2][0] > blocks[-1][0]:
            x2, n2 = blocks.pop()
            x1, n1 = blocks.pop()
            blocks.append([(x1 * n1 + x2 * n2) / (n1 + n2), n1 + n2])
    return np.concatenate([np.full(n, x) for x, n in blocks])


@dataclass(frozen=True)
class Recruitment:
    """Per-site monotone recruitment maps ``v = f(u)``: piecewise linear through knots, linear beyond them.

    Attributes
    ----------
    knots, values : ndarray, shape (n_inputs, n_knots)
        Amplitudes (µA) and ``f`` there (``f(0) = 0``).
    monotone : tuple of bool
        Per site: whether the fitted map was monotone (within the tolerance).
    input_names : tuple of str
    """

    knots: np.ndarray
    values: np.ndarray
    monotone: tuple
    input_names: tuple

    def _one(self, x, i, inverse):
        k, v = (self.values[i], self.knots[i]) if inverse else (self.knots[i], self.values[i])
        lo = (v[1] - v[0]) / (k[1] - k[0]) if k[1] > k[0] else 0.0
        hi = (v[-1] - v[-2]) / (k[-1] - k[-2]) if k[-1] > k[-2] else 0.0
        out = np.interp(x, k, v)
        out = np.where(x < k[0], v[0] + lo * (x - k[0]), out)
        return np.where(x > k[-1], v[-1] + hi * (x - k[-1]), out)

    def forward(self, u) -> np.ndarray:
        """``v = f(u)`` for inputs ``u`` (..., n_inputs)."""
        u = np.asarray(u, np.float64)
        return np.stack([self._one(u[..., i], i, False) for i in range(u.shape[-1])], axis=-1)

    def inverse(self, v) -> np.ndarray:
        """``u = f⁻¹(v)`` for transformed inputs ``v`` (..., n_inputs); only for monotone maps.

        Raises
        ------
        InvalidParameterError
            When a site's map is not monotone (it has no inverse).
        """
        bad = [n for n, ok in zip(self.input_names, self.monotone) if not ok]
        if bad:
            raise InvalidParameterError(f"the recruitment of site(s) {bad} is not monotone, so transformed inputs "
                                        "cannot be decoded to amplitudes; refit with more data or fewer knots.")
        v = np.asarray(v, np.float64)
        # strictly increasing values for interpolation; flat pieces (saturation) decode to their smallest amplitude
        strict = self.values + 1e-12 * np.arange(self.values.shape[1])[None]
        rec = Recruitment(self.knots, strict, self.monotone, self.input_names)
        return np.stack([rec._one(v[..., i], i, True) for i in range(v.shape[-1])], axis=-1)


class HammersteinArx(BasePredictor):
    """Static monotone recruitment per site, then ridge ARX dynamics (a Hammerstein model).

    Parameters
    ----------
    past_steps : int, default 2
        Lags of the over-parametrised regression and of the linear part (outputs and inputs).
    n_knots : int, default 7
        Knots of each site's map, evenly spread over the training amplitudes (at least 3).
    alpha : float, default 1e-6
        Ridge strength (per row, on standardised columns) of the over-parametrised regression.
    monotone_tolerance : float, default 0.1
        Largest fall of a map, as a fraction of its range, still taken as noise (and pooled away).

    Attributes
    ----------
    recruitment_ : Recruitment
    raw_values_ : ndarray, shape (n_inputs, n_knots)
        Knot values before pooling (what the data gave).
    monotone_ : bool
        Every site's map is monotone; planning refuses otherwise.
    linear_ : RidgeArx
        The linear part, in the transformed inputs.
    selection_table_ : pandas.DataFrame
        Per site and knot: amplitude, fitted value, pooled value.
    selection_notes_ : tuple of str
    past_steps_, max_horizon_steps_ (None), n_inputs_, n_outputs_, input_names_, output_names_, input_units_,
    output_units_

    Raises
    ------
    InvalidParameterError
        Fewer than 3 knots, or a negative alpha or tolerance.
    SessionError
        A site whose amplitude never varies in the training trials (its recruitment cannot be seen).
    """

    storage_kind = "hammerstein_arx"
    #: Not in the benchmark's default method set (opt in with a MethodSpec): its plans refuse the slew limits and
    #: energy budgets the bench's closed loops obey (measured in benchmarks/README.md, bench_accuracy.py bench-set).
    in_default_bench = False
    #: The lifted state / the linear part carries a constant, so an output offset needs no centring.
    fit_intercept = True
    has_linear_maps = False

    def __init__(self, *, past_steps=2, n_knots=7, alpha=1e-6, monotone_tolerance=0.1):
        self.past_steps = past_steps
        self.n_knots = n_knots
        self.alpha = alpha
        self.monotone_tolerance = monotone_tolerance

    def _check(self, session):
        L, K = self.past_steps, self.n_knots
        for name, v, least in (("past_steps", L, 1), ("n_knots", K, 3)):
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < least:
                raise InvalidParameterError(f"{name} must be a whole number >= {least}; got {v!r}.")
        if not float(self.alpha) >= 0 or not float(self.monotone_tolerance) >= 0:
            raise InvalidParameterError(f"alpha and monotone_tolerance must be >= 0; got {self.alpha!r} and "
                                        f"{self.monotone_tolerance!r}.")
        segs = session.segments(min_length=int(L) + 2)
        if not segs:
            raise SessionError(f"no valid segment holds more than past_steps + 1 = {int(L) + 1} samples; use a "
                               "shorter past window or longer trials.")
        u = np.concatenate([session.read(a, b)[0] for a, b in segs])
        lo, hi = u.min(0), u.max(0)
        flat = [n for n, a, b in zip(session.input_names, lo, hi) if not b > a]
        if flat:
            raise SessionError(f"site(s) {flat} never vary in the training trials, so their recruitment cannot be "
                               "fitted; stimulate every site at several amplitudes.")
        lo, hi = np.minimum(lo, 0.0), np.maximum(hi, 0.0)
        return int(L), int(K), segs, np.linspace(lo, hi, int(K)).T

    def fit(self, session):
        """Fit the recruitment maps (two-step method), check their monotonicity, then fit the linear part."""
        L, K, segs, knots = self._check(session)
        m = session.n_inputs
        theta = self._overparametrised(session, segs, knots, L)
        raw = np.empty((m, K))
        for i in range(m):
            raw[i] = self._site_values(theta[:, i], knots[i])
        values, monotone, notes = self._monotone(raw, knots, session.input_names)
        self.recruitment_ = Recruitment(knots, values, tuple(monotone), tuple(session.input_names))
        self.raw_values_, self.monotone_ = raw, bool(all(monotone))
        v = self.recruitment_.forward(np.where(session.mask[:, None], session.u, 0.0))
        self.linear_ = RidgeArx(output_lags=L, input_lags=L).fit(session.replace(u=v))
        self._describe(session)
        self.selection_table_ = pd.DataFrame([
            {"site": n, "amplitude": float(knots[i, j]), "fitted": float(raw[i, j]), "used": float(values[i, j])}
            for i, n in enumerate(session.input_names) for j in range(K)])
        self.selection_notes_ = tuple(notes)
        return self

    def _overparametrised(self, session, segs, knots, L):
        """Ridge coefficients of the hat-basis inputs, shape (L·p, m, K): lag-and-output rows, site, knot.

        A regularised fit whose lagged design would exceed :data:`_DESIGN_MAX` entries takes the streamed normal
        equations of :class:`~stimsteer.sysid.arx.RidgeArx` (the same problem: standardised regressors, penalty
        ``alpha·n``, intercept; the lag products of the raw channels instead of the design): at past 100 on a
        1 kHz session with 3 sites and 20 outputs the design held 4,100 columns of 47,500 rows, and the fit took
        52 s and 7.8 GB. Smaller designs, and ``alpha = 0`` (the minimum-norm solution of a rank-deficient
        design: the hat functions sum to one), are solved directly as before.
        """
        m, p, K = session.n_inputs, session.n_outputs, knots.shape[1]
        rows = sum(b - a - L for a, b in segs)
        if float(self.alpha) > 0 and rows * L * (p + m * K) > _DESIGN_MAX:
            return self._streamed(session, knots, L)
        Xs, Ys = [], []
        for a, b in segs:
            u, y, _ = session.read(a, b)
            n = len(u)
            G = _hat_channels(u, knots)
            cols = [y[L - 1 - i:n - 1 - i] for i in range(L)]
            cols += [G[L - i:n - i] for i in range(L)]
            Xs.append(np.hstack(cols))
            Ys.append(y[L:])
        X, Y = np.vstack(Xs), np.vstack(Ys)
        mx, sx = X.mean(0), X.std(0)
        sx = np.where(sx > 1e-12, sx, 1.0)
        Z = (X - mx) / sx
        k = Z.shape[1]
        Za = np.vstack([Z, np.sqrt(float(self.alpha) * Z.shape[0]) * np.eye(k)])
        Ya = np.vstack([Y - Y.mean(0), np.zeros((k, p))])
        coef = sla.lstsq(Za, Ya, lapack_driver="gelsd")[0] / sx[:, None]  # (L·p + L·m·K, p)
        return _site_blocks(coef[L * p:], L, m, K, p)

    def _streamed(self, session, knots, L):
        """:meth:`_overparametrised` by :class:`RidgeArx` on the hat-basis channels (lags 0 … L − 1 of the inputs,
        1 … L of the outputs)."""
        m, p, K = session.n_inputs, session.n_outputs, knots.shape[1]
        G = _hat_channels(np.where(session.mask[:, None], session.u, 0.0), knots)
        names = [f"{n}@{j}" for n in session.input_names for j in range(K)]
        hat = session.replace(u=G, input_names=tuple(names), input_units=tuple(["1"] * len(names)))
        # one strength: nothing to choose, so the fewest folds its cross-validation allows (its table is not used)
        arx = RidgeArx(output_lags=L, input_lags=L, delay_samples=0, alphas=(float(self.alpha),), n_folds=2).fit(hat)
        return _site_blocks(np.asarray(arx.coef_, np.float64)[:, L * p:].T, L, m, K, p)

    @staticmethod
    def _site_values(block, knots):
        """Knot values of one site from its (L·p, K) coefficient block: leading right singular vector, f(0) = 0."""
        _, s, Vt = np.linalg.svd(block, full_matrices=False)
        if s[0] <= 1e-12:
            return knots.copy()  # the site has no visible effect: keep the identity map
        w = Vt[0]
        values = w - np.interp(0.0, knots, w)
        span = values[-1] - values[0]
        if span == 0:
            return knots.copy()
        return values * (knots[-1] - knots[0]) / span  # increasing, unit mean slope

    def _monotone(self, raw, knots, names):
        values, flags, notes = raw.copy(), [], []
        for i, name in enumerate(names):
            v = raw[i]
            fall = float(np.max(np.maximum.accumulate(v) - v))
            span = float(v.max() - v.min()) or 1.0
            ok = fall <= float(self.monotone_tolerance) * span
            flags.append(ok)
            if ok:
                pooled = _pava(v)
                values[i] = pooled - np.interp(0.0, knots[i], pooled)
            else:
                notes.append(f"the recruitment of site {name!r} is not monotone (it falls by {100 * fall / span:.0f} "
                             f"% of its range, above the {100 * float(self.monotone_tolerance):.0f} % tolerance); it "
                             "is used for prediction but plans refuse it. Check the site's amplitudes, or refit "
                             "with fewer knots or more data.")
        return values, flags, notes

    def _describe(self, session):
        self.past_steps_, self.max_horizon_steps_ = int(self.linear_.past_steps_), None
        self.n_inputs_, self.n_outputs_ = int(session.n_inputs), int(session.n_outputs)
        self.input_names_, self.output_names_ = tuple(session.input_names), tuple(session.output_names)
        self.input_units_, self.output_units_ = tuple(session.input_units), tuple(session.output_units)

    # -------------------------------------------------------------------------------------------- predict
    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """Predictions of a batch of windows: the linear part driven by the recruited inputs."""
        check_fitted(self, "linear_")
        up, yp, uf = self._check_batch(u_past, y_past, u_future)
        f = self.recruitment_.forward
        return self.linear_.predict_many(f(up), yp, f(uf))

    def rest_window(self):
        """The linear part's rest window (zero amplitude is zero recruitment)."""
        check_fitted(self, "linear_")
        return self.linear_.rest_window()

    def recruitment(self) -> Recruitment:
        """The fitted per-site maps (see :class:`Recruitment`)."""
        check_fitted(self, "linear_")
        return self.recruitment_

    def linear_part(self):
        """The fitted linear predictor from the transformed inputs ``v = f(u)`` to the outputs."""
        check_fitted(self, "linear_")
        return self.linear_

    # -------------------------------------------------------------------------------------------- storage
    def to_state(self) -> dict:
        """Everything needed to rebuild the fitted predictor."""
        check_fitted(self, "linear_")
        r = self.recruitment_
        return {"params": self.get_params(), "knots": r.knots, "values": r.values, "raw_values": self.raw_values_,
                "monotone": [bool(x) for x in r.monotone], "linear": self.linear_.to_state(),
                "names": [list(self.input_names_), list(self.output_names_), list(self.input_units_),
                          list(self.output_units_)], "selection_notes": list(self.selection_notes_)}

    @classmethod
    def from_state(cls, state: dict) -> "HammersteinArx":
        """Rebuild a fitted predictor from :meth:`to_state` output."""
        obj = cls(**dict(state["params"]))
        ins, outs, iu, ou = state["names"]
        obj.recruitment_ = Recruitment(np.asarray(state["knots"], float), np.asarray(state["values"], float),
                                       tuple(bool(x) for x in state["monotone"]), tuple(ins))
        obj.raw_values_ = np.asarray(state["raw_values"], float)
        obj.monotone_ = bool(all(obj.recruitment_.monotone))
        obj.linear_ = RidgeArx.from_state(state["linear"])
        obj.past_steps_, obj.max_horizon_steps_ = int(obj.linear_.past_steps_), None
        obj.n_inputs_, obj.n_outputs_ = len(ins), len(outs)
        obj.input_names_, obj.output_names_, obj.input_units_, obj.output_units_ = (tuple(x) for x in
                                                                                   (ins, outs, iu, ou))
        obj.selection_notes_ = tuple(state.get("selection_notes", ()))
        K = obj.recruitment_.knots
        obj.selection_table_ = pd.DataFrame([
            {"site": n, "amplitude": float(K[i, j]), "fitted": float(obj.raw_values_[i, j]),
             "used": float(obj.recruitment_.values[i, j])} for i, n in enumerate(ins) for j in range(K.shape[1])])
        obj._mark_fitted()
        return obj
