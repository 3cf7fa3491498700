"""The model predictive controller: planning with a state-space realisation of the indirect route.

``ŷ = G u + Φ x̂ (+ output offset)`` with ``x̂`` from the model's Kalman predictor over the measured past; condensed
(inputs only) or sparse (states as variables). The target is an output trajectory, or a state (then the state cost
replaces the output cost). Any object with ``state_space_model()`` (the :class:`~stimsteer.sysid.StateSpaceForm`
capability: a :class:`~stimsteer.sysid.StateSpaceModel`, a fitted ridge ARX or subspace estimator) can be the model.

References
----------
Rawlings J.B., Mayne D.Q., Diehl M.M. (2017), Model Predictive Control: Theory, Computation, and Design, 2nd ed.
"""

from __future__ import annotations

from functools import partial

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp

from ...sysid import InvalidParameterError, SessionError, StateSpaceForm
from ._settings import _clip_psd, _horizon, _output_target, _sqrt_weight
from .condensed import _CondensedCore, _LinearStateMap, _condensed_terms, condensed_outputs, condensed_prediction
from .steady import SteadyState, _SteadyTarget
from ...sysid._lazy import lazy_module

cp = lazy_module("cvxpy")  # imported at the first plan that needs it (sysid/_lazy.py)

__all__ = ["ModelPredictiveController", "SteadyState"]


class ModelPredictiveController(_CondensedCore):
    """Predictive control of stimulation with a fitted state-space model (the indirect route).

    Parameters
    ----------
    model : StateSpaceForm
        A :class:`~stimsteer.sysid.StateSpaceModel`, or any object with ``state_space_model()`` (a fitted
        ``RidgeArx`` or ``SubspaceId``); its realisation is taken at :meth:`fit`. In the physical input units of the
        limits (µA).
    limits : StimLimits
        Matched to the model's inputs by name when named (:meth:`StimLimits.aligned`).
    horizon_steps : int
        ``N``, samples.
    output_weight : float, ndarray (p,) or (p, p), default 1.0
        ``Q`` of the output tracking cost (output kind).
    input_weight : float, ndarray (m,) or (m, m), default 1e-3
        ``R`` of the input energy cost, per µA².
    state_weight : float, ndarray (n,) or (n, n), default 1.0
        ``Q`` of the state tracking cost (state kind), over ``x_1..x_N``.
    terminal_weight : None, "riccati" or ndarray (n, n), default None
        Terminal cost on ``x_N − x_T``: none, the solution ``P`` of the discrete algebraic Riccati equation of the
        stage cost (for the state kind ``P − Q``, since ``x_N`` is already in the stage cost), or a PSD matrix.
        With ``"riccati"``, ``x_T`` comes from the steady state ``(x_s, u_s)`` of the model for the target (see
        :meth:`steady_state`), so that the plan equals the LQR tracking law; with a matrix, ``x_T`` is the target
        state (state kind) or the minimum-norm state with ``C x = r_{N−1}`` (output kind).
    output_offset : ndarray, shape (n_outputs,), optional
        When the model describes ``y − output_offset`` (e.g. ``info["output_offset"]`` of a ridge ARX model, the
        resting output), give it here: past outputs, targets, output bounds and predictions then stay in the
        outputs' own units. Default none (the model describes ``y`` itself). :func:`controller_for` passes it.
    target_kind : {"output", "state"}, default "output"
    formulation : {"condensed", "sparse"}, default "condensed"
        The cvxpy problem with inputs only (``ŷ = G u + Φ x̂``) or with the states as variables and the dynamics
        as equality constraints (better conditioned for long horizons of slow models). The fast path is condensed.
    output_penalty : float, default 1e4
        ``ρ`` of the exact L1 penalty on soft output-bound slack; it must exceed the bounds' Lagrange
        multipliers for the bounds to hold whenever they can.
    solver : str, default "CLARABEL"
        cvxpy solver of the plain path.
    fast_path : bool, default True
        Plan with the reusable OSQP problem when the problem is a QP.
    solver_options : dict, optional
        Passed to ``cvxpy.Problem.solve``.

    Attributes
    ----------
    problem_ : cvxpy.Problem
        The compiled-once problem (DPP).
    model_ : StateSpaceModel
        The realisation planned with (``model.state_space_model()``).
    target_kind_ : str
        ``"output"`` or ``"state"``, as planned (read by closed loops).
    limits_ : StimLimits
        The limits aligned to the model's inputs and outputs.
    past_steps_ : int
        Past window used for the Kalman state estimate (the model's ``past_steps``).
    horizon_steps_, n_inputs_, n_outputs_, n_states_ : int
    input_names_, output_names_ : tuple of str
    riccati_ : ndarray (n, n) or None
        The Riccati solution when ``terminal_weight="riccati"``.
    lqr_gain_ : ndarray (m, n) or None
        ``K`` of the LQR law above when ``terminal_weight="riccati"``.

    Notes
    -----
    With ``terminal_weight="riccati"``, a constant target and no binding limit, the first planned move equals the
    LQR tracking law ``u_0 = u_s − K (x̂ − x_s)``, ``K = (R + BᵀPB)⁻¹ (BᵀPA + Sᵀ)``, for any horizon. ``(x_s, u_s)``
    is the steady-state target of the stage cost: it minimises ``|C x + D u − r|²_Q + |u|²_R`` over the equilibria
    ``x = A x + B u`` (Rawlings, Mayne, Diehl 2017, Sec. 1.5, with input set-point zero, since the stage cost
    penalises the input itself). With its multiplier ``μ`` (``∇ℓ(x_s, u_s) = [I − A, −B]ᵀ μ``) the stage costs of
    any trajectory sum to ``N ℓ_s + μᵀ(Δx_0 − Δx_N) + Σ q(Δx_k, Δu_k)``, with ``q`` the quadratic part in the
    deviations from ``(x_s, u_s)``; the terminal cost ``Δx_Nᵀ P Δx_N + μᵀ Δx_N``, a quadratic centred at
    ``x_T = x_s − P⁻¹μ / 2``, then makes the finite-horizon problem the infinite-horizon LQR problem in the
    deviations (dynamic programming). When no equilibrium gives the target exactly, ``(x_s, u_s)`` is the closest
    compromise and :meth:`steady_state` says so (``exact`` False).

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.sysid import StateSpaceModel
    >>> from stimsteer.control.limits import StimLimits
    >>> model = StateSpaceModel(A=[[0.9]], B=[[1.0]], C=[[1.0]])
    >>> ctrl = ModelPredictiveController(model=model, limits=StimLimits(amplitude_min_ua=-1, amplitude_max_ua=1,
    ...                                  n_inputs=1), horizon_steps=5).fit()
    >>> plan = ctrl.plan(np.zeros((1, 1)), np.zeros((1, 1)), target=[3.0])
    >>> bool(plan.ok and np.all(np.abs(plan.inputs) <= 1.0))
    True
    """

    def __init__(self, *, model, limits, horizon_steps, output_weight=1.0, input_weight=1e-3, state_weight=1.0,
                 terminal_weight=None, output_offset=None, target_kind="output", formulation="condensed",
                 output_penalty=1e4, solver="CLARABEL", fast_path=True, solver_options=None):
        self.model = model
        self.output_offset = output_offset
        self.limits = limits
        self.horizon_steps = horizon_steps
        self.output_weight = output_weight
        self.input_weight = input_weight
        self.state_weight = state_weight
        self.terminal_weight = terminal_weight
        self.target_kind = target_kind
        self.formulation = formulation
        self.output_penalty = output_penalty
        self.solver = solver
        self.fast_path = fast_path
        self.solver_options = solver_options

    def fit(self, session=None):
        """Validate the settings and build the control problem once.

        Parameters
        ----------
        session : Session, optional
            Not needed (the model is already fitted); when given, its channel counts are checked against the
            model's.

        Returns
        -------
        self

        Raises
        ------
        InvalidParameterError
            On a model without a state-space form, or a bad horizon, weight, offset, target kind or formulation.
        SessionError
            When the session's channels differ from the model's.
        LimitsError
            When the limits do not match the model's inputs or outputs.
        """
        model = self._realisation()
        if session is not None and (session.n_inputs, session.n_outputs) != (model.n_inputs, model.n_outputs):
            raise SessionError(f"the session has {session.n_inputs} inputs and {session.n_outputs} outputs but the "
                               f"model {model.n_inputs} and {model.n_outputs}.")
        N = _horizon(self.horizon_steps, None)
        self._check_choices()
        self.problem_ = self._steady = self.lqr_gain_ = None
        self.model_, self.target_kind_ = model, self.target_kind
        self._setup_common(model.input_names, model.output_names, N)
        self.n_states_ = n = model.n_states
        self.past_steps_ = model.past_steps
        self._y_off = self._offset_values(model.n_outputs)
        self._y_off_N = np.tile(self._y_off, N)
        self._free_cache = self._offsets_cache = None
        self._state_map = _LinearStateMap(model, model.past_steps)  # the estimate as a precomputed linear map
        state = self.target_kind == "state"
        if state:
            Gy, Phi_y, Gx, self._Phi_x = condensed_prediction(model, N)
            Gx_last = Gx[(N - 1) * n:]
        else:  # the states' maps are N·n rows each: only their last block row, for a terminal cost
            (Gy, Phi_y, Gx_last), Gx, self._Phi_x = condensed_outputs(model, N), None, None
        self._Phi_y = Phi_y
        self._Cpinv = np.linalg.pinv(model.C)
        Lq = _sqrt_weight("state_weight" if state else "output_weight",
                          self.state_weight if state else self.output_weight, n if state else model.n_outputs)
        Lz = sla.block_diag(*[Lq] * N)
        self._Lz, self._Lz_diag = Lz, False
        self.riccati_, Lp = self._terminal_factor(Lq)
        self._Lp = Lp
        self._AN = None if Lp is None else np.linalg.matrix_power(model.A, N)  # read only with a terminal cost
        T = None if Lp is None else Gx_last
        self._build_condensed(Gy, Gx if state else Gy, Lz, T, Lp)
        if self.formulation == "sparse":
            self._build_sparse(Lq, Lp)
        return self

    def _realisation(self):
        """The state-space model of ``model`` (its ``state_space_model()``)."""
        if not isinstance(self.model, StateSpaceForm):
            raise InvalidParameterError(
                f"model must have a state-space form (state_space_model(): a StateSpaceModel, or a fitted RidgeArx "
                f"or SubspaceId); got {type(self.model).__name__}. Direct-route predictors go to "
                "DataPredictiveController.")
        return self.model.state_space_model()

    def _check_choices(self):
        """Refuse a target kind or formulation that does not exist."""
        if self.target_kind not in ("output", "state"):
            raise InvalidParameterError(f"target_kind must be 'output' or 'state'; got {self.target_kind!r}.")
        if self.formulation not in ("condensed", "sparse"):
            raise InvalidParameterError(f"formulation must be 'condensed' or 'sparse'; got {self.formulation!r}.")

    def _offset_values(self, p):
        """``output_offset`` as (p,) finite values (zeros when not given)."""
        off = self.output_offset
        values = np.zeros(p) if off is None else np.asarray(off, np.float64).reshape(-1)
        if values.shape != (p,) or not np.all(np.isfinite(values)):
            raise InvalidParameterError(f"output_offset must be {p} finite values (one per output); got {off!r}. "
                                        "Give the offset the model's outputs were centred by, or None.")
        return values

    def _terminal_factor(self, Lq):
        tw = self.terminal_weight
        if tw is None:
            return None, None
        model, n = self.model_, self.model_.n_states
        if isinstance(tw, str):
            if tw != "riccati":
                raise InvalidParameterError(f"terminal_weight must be None, 'riccati' or an (n, n) matrix; got "
                                            f"{tw!r}.")
            Q = Lq.T @ Lq
            R = self._Ru[:self.n_inputs_, :self.n_inputs_].T @ self._Ru[:self.n_inputs_, :self.n_inputs_]
            if self.target_kind == "output":
                Qx, S, Rr = model.C.T @ Q @ model.C, model.C.T @ Q @ model.D, R + model.D.T @ Q @ model.D
            else:
                Qx, S, Rr = Q, np.zeros((n, self.n_inputs_)), R
            try:
                P = sla.solve_discrete_are(model.A, model.B, Qx, Rr, s=S)
            except (np.linalg.LinAlgError, ValueError) as exc:
                raise InvalidParameterError(f"the Riccati terminal cost has no stabilising solution ({exc}); use a "
                                            "positive definite input_weight, or terminal_weight=None.") from None
            P = 0.5 * (P + P.T)
            # the state cost already holds x_N, so the tail beyond it is P − Q (PSD up to rounding)
            W = _clip_psd(P - Qx if self.target_kind == "state" else P)
            self._steady = _SteadyTarget(model, Q, R, self.target_kind, W)
            self.lqr_gain_ = np.linalg.solve(Rr + model.B.T @ P @ model.B, model.B.T @ P @ model.A + S.T)
            return P, _sqrt_weight("terminal_weight", W, n)
        return None, _sqrt_weight("terminal_weight", tw, n)

    def steady_state(self, target):
        """The steady-state target ``(x_s, u_s)`` the Riccati terminal cost is centred on.

        Parameters
        ----------
        target : array_like
            As for :meth:`plan`: ``(p,)`` or ``(N, p)`` outputs (the last row is held), or ``(n,)`` for the state
            kind.

        Returns
        -------
        SteadyState

        Raises
        ------
        InvalidParameterError
            When the controller has no Riccati terminal cost (``terminal_weight != "riccati"``).
        """
        if getattr(self, "_steady", None) is None:
            raise InvalidParameterError("steady_state needs terminal_weight='riccati' (fit the controller first).")
        t = self._check_target(target)
        return self._steady.solve(t if self.target_kind == "state" else self._target_rows(t)[-1] - self._y_off)

    def _build_sparse(self, Lq, Lp):
        """Replace the cvxpy problem by the sparse one (states as variables); the fast path stays condensed."""
        model, N, m, n = self.model_, self.horizon_steps_, self.n_inputs_, self.n_states_
        u = self._u = cp.Variable(N * m, name="inputs_ua")
        X = cp.Variable((N + 1) * n, name="states")
        self._x0 = cp.Parameter(n, name="initial_state")
        self._rw = cp.Parameter(self._Lz.shape[0], name="weighted_target")
        IA = sp.kron(sp.eye(N), sp.csr_matrix(model.A))
        IB = sp.kron(sp.eye(N), sp.csr_matrix(model.B))
        Cb = sp.kron(sp.eye(N), sp.csr_matrix(model.C))
        Db = sp.kron(sp.eye(N), sp.csr_matrix(model.D))
        y = Cb @ X[:N * n] + Db @ u
        z = X[n:] if self.target_kind == "state" else y
        sw = self._cost_scale_parameters()  # the weighted targets are scaled when assigned
        cost = cp.sum_squares(sw * (self._Lz @ z) - self._rw) + cp.sum_squares(sw * (self._Ru @ u))
        cons = [X[:n] == self._x0, X[n:] == IA @ X[:N * n] + IB @ u]
        if Lp is not None:
            self._xtw = cp.Parameter(n, name="weighted_terminal_state")
            cost = cost + cp.sum_squares(sw * (Lp @ X[N * n:]) - self._xtw)
        Cb, Db = Cb.tocsr(), Db.tocsr()
        off = np.tile(self._y_off, N)  # the model describes y − output_offset
        more, self._slack_var = self._common_constraints(
            u, lambda idx: Cb[idx] @ X[:N * n] + Db[idx] @ u, (self._ymax - off)[self._idx_hi],
            (self._ymin - off)[self._idx_lo])
        if self._slack_var is not None:
            cost = cost + self._sw2 * (float(self.output_penalty) * cp.sum(self._slack_var))
        self.problem_ = cp.Problem(cp.Minimize(cost), cons + more)

    # ------------------------------------------------------------------------------------ per plan
    def _check_target(self, target):
        t = np.asarray(target, dtype=np.float64)
        N = self.horizon_steps_
        if self.target_kind == "state":
            if t.shape != (self.n_states_,) or not np.all(np.isfinite(t)):
                raise SessionError(f"a state target must be {self.n_states_} finite values; got shape {t.shape}.")
            return t
        return _output_target(t, N, self.n_outputs_)

    def _target_rows(self, target):
        return np.tile(target, (self.horizon_steps_, 1)) if target.ndim == 1 else target

    def _x_terminal(self, target):
        if getattr(self, "_steady", None) is not None:
            r = target if self.target_kind == "state" else self._target_rows(target)[-1] - self._y_off
            return self._steady.centre(r)
        return target if self.target_kind == "state" else self._Cpinv @ (target[-1] - self._y_off)

    def _free(self, u_past, y_past):
        """State estimate and free output response (in the outputs' units, offset included).

        Cached for the arrays of the plan being made (offsets, prediction and cost terms all need it).
        """
        cached = self._free_cache
        if cached is not None and cached[0] is u_past and cached[1] is y_past:
            return cached[2]
        x0 = self._state_map(u_past, y_past - self._y_off)
        out = (x0, self._Phi_y @ x0 + self._y_off_N)
        self._free_cache = (u_past, y_past, out)
        return out

    def _tracked(self, x0, fy, target):
        """Free response and target of the tracked signal (outputs, or states x_1..x_N)."""
        if self.target_kind == "state":
            return self._Phi_x @ x0, np.tile(target, self.horizon_steps_)
        return fy, target.reshape(-1)

    def _offsets(self, u_past, y_past, target):
        x0, fy = self._free(u_past, y_past)
        fz, rz = self._tracked(x0, fy, target)
        ew = self._weigh(fz - rz)
        # the terminal state is read only with a terminal cost (without one neither problem has its rows)
        xt = None if self._Lp is None else self._x_terminal(target)
        tw = None if self._Lp is None else self._Lp @ (self._AN @ x0 - xt)
        if self.formulation == "sparse":  # the sparse cvxpy problem takes the state and the weighted target
            rz_model = rz if self.target_kind == "state" else rz - self._y_off_N
            self._sparse_values = (x0, self._Lz @ rz_model, None if self._Lp is None else self._Lp @ xt)
        self._offsets_cache = (u_past, y_past, target, ew, tw)
        return ew, tw, fy

    def _weigh(self, v):
        """``Lz @ v``; for a diagonal ``Lz`` (a weight per output) its diagonal times ``v``: each row's one nonzero
        product, the same number as the dense product's sum with exact zeros."""
        d = getattr(self, "_Lz_diag", False)
        if d is False:  # read off once per fit (a refit builds Lz anew and resets it)
            L = self._Lz
            d = self._Lz_diag = np.diag(L).copy() if np.count_nonzero(L - np.diag(np.diag(L))) == 0 else None
        return self._Lz @ v if d is None else d * v

    def _assign(self, offsets):
        if self.formulation == "condensed":
            return super()._assign(offsets)
        x0, rw, xtw = self._sparse_values
        self._x0.value, self._rw.value = x0, self._cost_sw * rw
        if xtw is not None:
            self._xtw.value = self._cost_sw * xtw

    def _predict_outputs(self, u, aux, u_past, y_past):
        _, fy = self._free(u_past, y_past)
        return (self._Gy @ u.reshape(-1) + fy).reshape(self.horizon_steps_, self.n_outputs_)

    def _cost_terms_later(self, u, aux, y, u_past, y_past, target):
        """With this plan's weighted offsets at hand (its solve's), the terms as a function of them and of the
        condensed matrices (captured: a refit replaces them), computed at the first read of ``Plan.cost_terms``."""
        cached = self._offsets_cache
        if cached is not None and cached[0] is u_past and cached[1] is y_past and cached[2] is target:
            return partial(_condensed_terms, self._LG, self._Ru, self._LpT, u, cached[3], cached[4])
        return super()._cost_terms_later(u, aux, y, u_past, y_past, target)

    def _cost_terms(self, u, aux, y, u_past, y_past, target):
        cached = self._offsets_cache
        if cached is not None and cached[0] is u_past and cached[1] is y_past and cached[2] is target:
            return self._condensed_terms(u, cached[3], cached[4])  # the weighted offsets of this plan's solve
        x0, fy = self._free(u_past, y_past)
        fz, rz = self._tracked(x0, fy, target)
        tw = None if self._Lp is None else self._Lp @ (self._AN @ x0 - self._x_terminal(target))
        return self._condensed_terms(u, self._Lz @ (fz - rz), tw)
