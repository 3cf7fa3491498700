"""The subspace identification estimator (:class:`SubspaceId`): one data pass, then order selection and estimation on
Gram blocks (see :mod:`stimsteer.sysid.subspace`).
"""

from __future__ import annotations

import contextlib
import json
import warnings

import numpy as np
import pandas as pd

from .._base import BasePredictor, check_fitted
from ..exceptions import ExcitationError, InvalidParameterError, SessionError, StimsteerWarning
from ..protocols import PredictionMaps
from .._offsets import ShiftedOutputs as _ShiftedOutputs, output_mean as _output_mean
from ..statespace import StateSpaceModel
from .._lagged import blas_thread_count, blas_threads
from .gram import _Layout
from .prepare import projections
from .projection import _fit_order
from .selection import choose_stable, order_tables

__all__ = ["SubspaceId"]


_WEIGHTINGS = ("n4sid", "moesp", "cva")
_SELECTION_DEFAULTS = {"holdout_fraction": 0.25, "tolerance": 0.05, "seed": 0}
_DEFAULT_ORDER_CAP = 10
# Singular values below this share of the largest are rounding noise: orders beyond them are not supported by data.
_SV_RTOL = 1e-8
#: Hankel rows from which the candidate orders are fitted on several threads (below, each order is too small for
#: threads to pay: most of its time holds the GIL).
_THREADED_FROM = 512
_TABLE_COLUMNS = ("order", "singular_value", "gap_ratio", "heldout_error", "stable", "selected")


# ----------------------------------------------------------------------------------------------------- estimator
class SubspaceId(BasePredictor):
    """Subspace identification of an innovation-form state-space model from a stimulation session.

    Parameters
    ----------
    past_steps : int, default 10
        Block rows ``i`` of the past (samples); the past window :meth:`predict` expects. Must cover the input
        delay plus the slowest dynamics of interest, and ``p i >= order``.
    future_steps : int, default 10
        Block rows ``f`` of the future (samples), at least 2; ``p (f − 1) >= order`` is needed.
    order : int or None, default None
        Number of states; None chooses it (see ``order_selection``).
    max_order : int or None, default None
        Largest order tried; default ``min(10, max possible)``, the max possible being ``min(p (f − 1), p i)``
        and the states the data support; by default the cap doubles (up to the max possible) while the held-out
        error is lowest at it, and a cap that still binds is reported in ``selection_notes_``.
    weighting : {"n4sid", "moesp", "cva"}, default "n4sid"
        Row/column weighting of the oblique projection before the SVD.
    feedthrough : bool or "auto", default "auto"
        Estimate a direct term ``D`` (True) or fix ``D = 0`` (False: stimulation does not reach the recording in
        the same sample); "auto" estimates it only when that lowers the best held-out error by more than the
        order-selection tolerance (``feedthrough_`` says which).
    order_selection : dict or None, default None
        ``holdout_fraction`` (0.25): share of the training trials held out for the order check (with a single
        trial, the last share of each segment); ``tolerance`` (0.05): relative excess of held-out error over the
        best order that still makes an order acceptable (the gap order is preferred among acceptable orders, then
        the smaller ones, and the first stable one is chosen; see :mod:`stimsteer.sysid.subspace.selection`);
        ``seed`` (0) of the held-out draw.
    centre_outputs : bool, default False
        Identify the model on the outputs minus their training mean (``output_offset_``), for recordings with a
        baseline offset. ``predict`` then works in the recorded units (the offset is removed from the past and
        added to the prediction), ``model_`` describes ``y − output_offset_`` and carries it as
        ``model_.info["output_offset"]``, which the controllers and network figures read.

    Attributes
    ----------
    model_ : StateSpaceModel
        Fitted model in the session's units, with ``K`` and ``innovation_cov``.
    order_ : int
    order_gap_ : int
        The order suggested by the largest gap ``σ_k / σ_{k+1}`` of the singular values.
    singular_values_ : ndarray, shape (p f,)
        Of the weighted projection on all training data (channels scaled to unit RMS; CVA: canonical correlations).
    order_table_ : pandas.DataFrame
        One row per candidate order: ``order``, ``singular_value``, ``gap_ratio``, ``heldout_error`` (mean
        k-step squared error over steps 1..f ÷ mean square output, on the held-out part, model fitted on the
        rest), ``stable`` (of the model fitted on the rest), ``selected``.
    selection_notes_ : tuple of str
        A stable order chosen over an unstable preferred one, an unstable order kept, or an order cap that binds.
    process_cov_, measurement_cov_, cross_cov_ : ndarray
        Residual covariances ``Q`` (n, n), ``R`` (p, p), ``S`` (n, p) in the session's units.
    is_stable_ : bool
    past_steps_ : int
    max_horizon_steps_ : None
        Predictions have no horizon limit.
    n_columns_ : int
        Hankel columns used.
    heldout_ : str
        How the held-out part was chosen.
    output_offset_ : ndarray, shape (n_outputs,)
        The training mean removed with ``centre_outputs`` (zeros otherwise).
    n_inputs_, n_outputs_ : int
    input_names_, output_names_, input_units_, output_units_ : tuple of str
        The channels of the training session.

    Raises
    ------
    SessionError
        Windows longer than every valid segment, fewer Hankel columns than rows, an order above the possible one,
        bad settings.
    ExcitationError
        Inputs that do not vary or do not excite the model.

    Notes
    -----
    Data model ``x[k+1] = A x[k] + B u[k] + K e[k]``, ``y[k] = C x[k] + D u[k] + e[k]``. Channels are scaled to unit
    RMS before the projections and the model is transformed back. The model has no constant term: remove offsets
    before fitting (``centre_outputs=True``, or ``prep.detrend``). ``A, C`` come from the shift invariance of Γ;
    ``B, D`` by least squares on the data given ``A, C``; the noise covariances from the residuals of the estimated
    state sequences; ``K`` from the filter Riccati equation. An unstable estimate is kept and reported
    (``is_stable_``, a warning), never changed.

    References
    ----------
    Van Overschee P., De Moor B. (1996), Subspace Identification for Linear Systems. Kluwer.
    Verhaegen M. (1994), Identification of the deterministic part of MIMO state space models given in innovations
    form from input-output data. Automatica 30(1):61-74.
    Larimore W.E. (1990), Canonical variate analysis in identification, filtering and adaptive control. CDC.

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.sysid import Session, StateSpaceModel
    >>> true = StateSpaceModel(A=[[0.9, 0.2], [0.0, 0.7]], B=[[0.0], [1.0]], C=[[1.0, 0.0]])
    >>> u = np.random.default_rng(0).normal(size=(600, 1))
    >>> est = SubspaceId(past_steps=4, future_steps=4).fit(Session(u=u, y=true.simulate(u), sample_rate_hz=100.0))
    >>> est.order_, bool(np.allclose(np.sort(est.model_.poles.real), [0.7, 0.9]))
    (2, True)
    """

    storage_kind = "subspace"

    def __init__(self, *, past_steps=10, future_steps=10, order=None, max_order=None, weighting="n4sid",
                 feedthrough="auto", order_selection=None, centre_outputs=False):
        self.past_steps = past_steps
        self.future_steps = future_steps
        self.order = order
        self.max_order = max_order
        self.weighting = weighting
        self.feedthrough = feedthrough
        self.order_selection = order_selection
        self.centre_outputs = centre_outputs

    # ------------------------------------------------------------------------------------------ validation
    @staticmethod
    def _int(name, value, low):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise InvalidParameterError(f"{name} must be an integer >= {low}; got {value!r}. Pass e.g. {name}={max(low, 10)}.")
        return int(value)

    def _settings(self, session) -> dict:
        i = self._int("past_steps", self.past_steps, 1)
        f = self._int("future_steps", self.future_steps, 2)
        if self.weighting not in _WEIGHTINGS:
            raise InvalidParameterError(f"weighting must be one of {list(_WEIGHTINGS)}; got {self.weighting!r}.")
        if not (isinstance(self.feedthrough, (bool, np.bool_)) or self.feedthrough == "auto"):
            raise InvalidParameterError(f"feedthrough must be True, False or 'auto'; got {self.feedthrough!r}.")
        m, p = int(session.n_inputs), int(session.n_outputs)
        if m < 1:
            raise SessionError("subspace identification needs at least one input channel; the session has none.")
        layout = _Layout(i, f, m, p)
        cap = layout.max_order
        order = None if self.order is None else self._int("order", self.order, 1)
        if order is not None and order > cap:
            raise InvalidParameterError(
                f"order {order} is above the largest possible order {cap} = min(p (f - 1), p i) for p={p} outputs, "
                f"past_steps={i}, future_steps={f}. Lower the order or lengthen past_steps/future_steps."
            )
        top = min(_DEFAULT_ORDER_CAP, cap) if self.max_order is None else self._int("max_order", self.max_order, 1)
        if top > cap:
            raise InvalidParameterError(
                f"max_order {top} is above the largest possible order {cap} = min(p (f - 1), p i); lower it or "
                "lengthen past_steps/future_steps."
            )
        top = max(top, order or 0)
        return {"layout": layout, "order": order, "top": top, **self._selection()}

    def _selection(self) -> dict:
        sel = dict(_SELECTION_DEFAULTS)
        given = self.order_selection or {}
        if not isinstance(given, dict):
            raise InvalidParameterError(f"order_selection must be a dict or None; got {type(given).__name__}.")
        unknown = sorted(set(given) - set(sel))
        if unknown:
            raise InvalidParameterError(f"order_selection has unknown keys {unknown}; allowed: {sorted(sel)}.")
        sel.update(given)
        frac, tol = sel["holdout_fraction"], sel["tolerance"]
        if not (isinstance(frac, (int, float)) and 0 < frac < 1):
            raise InvalidParameterError(f"order_selection['holdout_fraction'] must be in (0, 1); got {frac!r}.")
        if not (isinstance(tol, (int, float)) and tol >= 0):
            raise InvalidParameterError(f"order_selection['tolerance'] must be a number >= 0; got {tol!r}.")
        return {"fraction": float(frac), "tolerance": float(tol), "seed": self._int("seed", sel["seed"], 0)}

    # ------------------------------------------------------------------------------------------ fit
    def fit(self, session) -> "SubspaceId":
        """Identify the model from ``session`` (a :class:`Session` or a lazily opened session file).

        Parameters
        ----------
        session : Session or SessionFile
            Training data; Hankel columns are built inside ``session.segments()`` only.

        Returns
        -------
        self
        """
        cfg = self._settings(session)
        if not isinstance(self.centre_outputs, (bool, np.bool_)):
            raise InvalidParameterError(f"centre_outputs must be True or False; got {self.centre_outputs!r}.")
        offset = _output_mean(session) if self.centre_outputs else np.zeros(int(session.n_outputs))
        if self.centre_outputs:
            session = _ShiftedOutputs(session, offset)
        # large candidate orders are fitted on as many threads as BLAS had (one in a bench worker)
        cfg["workers"] = blas_thread_count() if cfg["layout"].nz >= _THREADED_FROM else 1
        cfg["ahead"] = lambda proj_fit, check: self._score_ahead(cfg, proj_fit, check)  # (factor route: see _ahead)
        with contextlib.ExitStack() as stack:  # (holds BLAS at one thread while proj_all's SVD may still run)
            proj_all, proj_fit, check, scale, how, n_columns = projections(session, cfg, self.weighting, stack)
            with blas_threads(1):  # small dense problems: threads only wait on each other at this size
                self._identify(session, cfg, proj_all, proj_fit, check, scale, how, n_columns)
        self.output_offset_ = offset
        if self.centre_outputs:
            self.model_ = self.model_.replace(info={**self.model_.info, "output_offset": offset.tolist()})
        return self

    def _identify(self, session, cfg, proj_all, proj_fit, check, scale, how, n_columns) -> None:
        L = cfg["layout"]
        memo, rank_fit = self._ahead(cfg, proj_all, proj_fit, check)
        sv = proj_all.singular_values
        notes = []
        cfg["top"] = self._supported(sv, proj_fit.singular_values, cfg)
        if memo is not None and cfg["supported"] != rank_fit:  # all data support fewer orders: score afresh
            memo = None
            proj_fit.forget_orders()
        table = order_tables(self, proj_fit, check, sv, cfg, notes, memo)
        gap = int(table["order"].iloc[int(np.argmax(table["gap_ratio"].to_numpy()))])
        if cfg["order"] is not None:
            order, mats = cfg["order"], _fit_order(proj_all, cfg["order"], self.feedthrough_)
        else:
            order, mats = choose_stable(table, gap, cfg["tolerance"], proj_all, self.feedthrough_, notes)
        table["selected"] = table["order"] == order
        self.order_gap_ = gap
        self.selection_notes_ = tuple(notes)
        self._store(mats, scale, session, L, order, sv, table, how, n_columns)

    def _ahead(self, cfg, proj_all, proj_fit, check):
        """The order tables' scores (:func:`~.selection.order_tables`' ``memo``) taken ahead, as if all data supported
        the orders the fitting part supports (``rank_fit``; all data support at most as many, mostly as many), then
        the wait for ``proj_all``'s SVD (:func:`~.prepare.projections`). On the factor route they were taken on the
        fitting part's thread as soon as its projection and the held-out rows were ready (``proj_fit.ahead``, from
        ``cfg["ahead"]``: :meth:`_score_ahead`), whether the main thread was still in all data's projection or its
        SVD already ran; otherwise they are taken here while that SVD still runs. The scores depend on the fitting
        part alone, and the rounds (caps) on them and on the supported rank: when that rank turns out the same, the
        real call finds every round in the memo. ``(memo or None, rank_fit)``."""
        pending = getattr(proj_all, "pending", None)
        early = getattr(proj_fit, "ahead", None)
        if early is not None:
            memo, rank_fit = early
        elif pending is not None and not pending.done():
            memo, rank_fit = self._score_ahead(cfg, proj_fit, check)
        else:
            memo, rank_fit = None, self._rank(proj_fit.singular_values)
        if pending is not None:
            pending.result()  # (re-raises what the decomposition raised)
        return memo, rank_fit

    @staticmethod
    def _rank(sv) -> int:
        return int(np.sum(sv > _SV_RTOL * max(float(sv[0]), 1.0)))

    def _score_ahead(self, cfg, proj_fit, check):
        """``(memo or None, rank_fit)``: the order tables' scores of the fitting part (see :meth:`_ahead`)."""
        sv_fit = proj_fit.singular_values
        rank_fit, memo = self._rank(sv_fit), None
        if rank_fit >= 1:
            memo, spec = {}, {**cfg, "top": min(cfg["top"], rank_fit), "supported": rank_fit}
            try:
                order_tables(self, proj_fit, check, sv_fit, spec, [], memo)
            except Exception:  # noqa: BLE001 - scored again in order below, where it raises
                memo = None
                proj_fit.forget_orders()
        return memo, rank_fit

    @staticmethod
    def _supported(sv_all, sv_fit, cfg) -> int:
        """Largest candidate order whose singular values (all data and fitting part) rise above rounding noise."""
        # relative to the largest value, and to 1 (unit-RMS channels): a static map leaves only rounding noise
        rank = min(int(np.sum(v > _SV_RTOL * max(float(v[0]), 1.0))) for v in (sv_all, sv_fit))
        if rank < 1:
            raise ExcitationError(
                "the data show no dynamics: the future outputs carry no information from the past beyond what the "
                "future inputs explain (every singular value is at rounding level). A static input-output map "
                "needs no state-space model; check that the outputs respond to the stimulation with some memory."
            )
        if cfg["order"] is not None and cfg["order"] > rank:
            raise SessionError(
                f"order {cfg['order']} is above the {rank} state(s) the data support: the singular values beyond "
                f"{rank} are below {_SV_RTOL:g} of the largest (noise-free data of a smaller system, or inputs that "
                f"excite too few modes). Use order <= {rank} or order=None."
            )
        cfg["supported"] = rank
        return min(cfg["top"], rank)

    def _store(self, mats, scale, session, L, order, sv, table, how, n_columns) -> None:
        su, sy = scale[:L.m], scale[L.m:]
        model = StateSpaceModel(
            A=mats["A"], B=mats["B"] / su, C=sy[:, None] * mats["C"], D=sy[:, None] * mats["D"] / su,
            K=mats["K"] / sy, innovation_cov=np.outer(sy, sy) * mats["Re"],
            sample_rate_hz=float(session.sample_rate_hz), past_steps=L.i,
            input_names=tuple(session.input_names), output_names=tuple(session.output_names),
            info={"method": "subspace", "weighting": self.weighting, "order": int(order), "gain": mats["gain"]},
            input_units=getattr(session, "input_units", None), output_units=getattr(session, "output_units", None),
        )
        self.model_ = model
        self.order_ = int(order)
        self.singular_values_ = sv.copy()
        self.order_table_ = table
        self.process_cov_ = mats["Q"].copy()
        self.measurement_cov_ = np.outer(sy, sy) * mats["R"]
        self.cross_cov_ = mats["S"] * sy
        self.is_stable_ = bool(model.is_stable)
        self._set_channels(model)
        self.past_steps_ = L.i
        self.max_horizon_steps_ = None
        self.n_columns_ = int(n_columns)
        self.heldout_ = how
        if not self.is_stable_:
            warnings.warn(
                f"the identified order-{order} model is unstable: spectral radius {model.spectral_radius:.4f} >= 1; "
                "free-run simulations will grow without bound. Try another order or longer past/future windows, "
                "and check whether the data were recorded in closed loop.",
                StimsteerWarning, stacklevel=5,
            )

    # ------------------------------------------------------------------------------------------ predict
    def _set_channels(self, model) -> None:
        self.n_inputs_, self.n_outputs_ = model.n_inputs, model.n_outputs
        self.input_names_, self.output_names_ = model.input_names, model.output_names
        self.input_units_, self.output_units_ = model.input_units, model.output_units

    def state_space_model(self):
        """The fitted state-space realisation with this estimator's past window (``model_``, offset in ``info``)."""
        check_fitted(self, "model_")
        return self.model_.replace(past_steps=int(self.past_steps_))

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """Predictions of a batch of windows, shapes (n_windows, n_samples, channels), from ``model_``.

        The whole past window (at least ``past_steps_`` samples) estimates the state; the output offset
        (``centre_outputs``) is removed from the past outputs and added to the predictions.
        """
        check_fitted(self, "model_")
        up, yp, uf = self._check_batch(u_past, y_past, u_future)
        off = self._offset()
        return self.model_.predict_many(up, yp - off, uf) + off

    def prediction_maps(self, past_steps: int, horizon_steps: int) -> PredictionMaps:
        """The affine map of :meth:`predict`: ``model_``'s maps with the output offset in ``c``."""
        check_fitted(self, "model_")
        T, N = int(past_steps), int(horizon_steps)
        if T < self.past_steps_ or N < 1:
            raise SessionError(f"the SubspaceId needs a past window of at least past_steps_ = {self.past_steps_} "
                               f"samples and a horizon of at least 1 step; got past {past_steps} and horizon "
                               f"{horizon_steps}.")
        maps = self.model_.prediction_maps(T, N)
        off = self._offset()
        c = np.tile(off, N) - maps.P[:, T * self.n_inputs_:] @ np.tile(off, T)
        return PredictionMaps(P=maps.P, F=maps.F, c=c, past_steps=T, horizon_steps=N)

    def rest_window(self) -> tuple[np.ndarray, np.ndarray]:
        """A past window at rest: zero input and the output offset, shapes (past_steps_, m) and (past_steps_, p)."""
        check_fitted(self, "model_")
        L = self.past_steps_
        return np.zeros((L, self.n_inputs_)), np.tile(self._offset(), (L, 1))

    # ------------------------------------------------------------------------------------------ storage
    def to_state(self) -> dict:
        """The fitted estimator as a dict of arrays, numbers, strings and nested dicts (for ``storage``)."""
        check_fitted(self, "model_")
        md = self.model_
        params = {k: v for k, v in self.get_params().items() if v is not None}
        if not isinstance(params["feedthrough"], str):
            params["feedthrough"] = int(bool(params["feedthrough"]))
        params["centre_outputs"] = int(bool(params["centre_outputs"]))
        return {
            "params": params, "output_offset": np.asarray(self.output_offset_, dtype=np.float64),
            "model": {"A": md.A, "B": md.B, "C": md.C, "D": md.D, "K": md.K, "innovation_cov": md.innovation_cov,
                      "sample_rate_hz": md.sample_rate_hz, "past_steps": md.past_steps,
                      "input_names": json.dumps(list(md.input_names)),
                      "output_names": json.dumps(list(md.output_names)), "info": json.dumps(md.info),
                      "input_units": json.dumps(list(md.input_units)),
                      "output_units": json.dumps(list(md.output_units))},
            "selection_notes": "\n".join(getattr(self, "selection_notes_", ())),
            "feedthrough": int(self.feedthrough_),
            "order": self.order_, "order_gap": self.order_gap_, "singular_values": self.singular_values_,
            "order_table": {c: self.order_table_[c].to_numpy() for c in self.order_table_.columns},
            "process_cov": self.process_cov_, "measurement_cov": self.measurement_cov_,
            "cross_cov": self.cross_cov_, "is_stable": int(self.is_stable_), "n_columns": self.n_columns_,
            "heldout": self.heldout_,
        }

    @classmethod
    def from_state(cls, state: dict) -> "SubspaceId":
        """Rebuild a fitted estimator from :meth:`to_state`."""
        params = dict(state["params"])
        ft = params.get("feedthrough", False)
        params["feedthrough"] = ft if isinstance(ft, str) else bool(ft)
        params["centre_outputs"] = bool(params.get("centre_outputs", False))
        est = cls(**params)
        md = state["model"]
        est.model_ = StateSpaceModel(
            A=md["A"], B=md["B"], C=md["C"], D=md["D"], K=md["K"], innovation_cov=md["innovation_cov"],
            sample_rate_hz=float(md["sample_rate_hz"]), past_steps=int(md["past_steps"]),
            input_names=tuple(json.loads(md["input_names"])), output_names=tuple(json.loads(md["output_names"])),
            info=json.loads(md["info"]),
            input_units=json.loads(md["input_units"]) if "input_units" in md else None,
            output_units=json.loads(md["output_units"]) if "output_units" in md else None,
        )
        est._set_channels(est.model_)
        est.output_offset_ = np.asarray(state.get("output_offset", np.zeros(est.model_.n_outputs)), dtype=np.float64)
        est.order_ = int(state["order"])
        est.order_gap_ = int(state["order_gap"])
        est.singular_values_ = np.asarray(state["singular_values"], dtype=np.float64)
        cols = state["order_table"]  # a file layout may return the columns in another order
        table = pd.DataFrame({k: np.asarray(cols[k]) for k in _TABLE_COLUMNS})
        table["order"] = table["order"].astype(np.int64)
        for col in ("stable", "selected"):
            table[col] = table[col].astype(bool)
        est.order_table_ = table
        est.feedthrough_ = bool(int(state.get("feedthrough", bool(np.any(est.model_.D != 0)))))
        est.selection_notes_ = tuple(n for n in str(state.get("selection_notes", "")).split("\n") if n)
        est.process_cov_ = np.asarray(state["process_cov"], dtype=np.float64)
        est.measurement_cov_ = np.asarray(state["measurement_cov"], dtype=np.float64)
        est.cross_cov_ = np.asarray(state["cross_cov"], dtype=np.float64)
        est.is_stable_ = bool(state["is_stable"])
        est.past_steps_ = est.model_.past_steps
        est.max_horizon_steps_ = None
        est.n_columns_ = int(state["n_columns"])
        est.heldout_ = str(state["heldout"])
        est._mark_fitted()
        return est
