"""The data predictive controller: planning straight from a data predictor of the direct route.

Two formulations, chosen from what the predictor declares (:mod:`stimsteer.sysid.protocols`), never from its class:

* DeePC (the :class:`~stimsteer.sysid.DataBlocksForm` capability, ``data_blocks()``): ``ŷ = Yf g`` with
  ``Up g = u_past``, ``Uf g = u`` and the route terms ``λ_y ‖Yp g − y_past‖² + λ_g R(g)`` (the slack on past
  outputs and the predictor's regulariser and strengths), on the predictor's (compressed) blocks.
* linear maps (a :class:`~stimsteer.sysid.LinearPredictor` with ``has_linear_maps``): ``ŷ = P past + F u + c`` from
  ``prediction_maps(past_steps_, N)``, the condensed problem of :mod:`~stimsteer.control.mpc.condensed`; for the
  least-squares predictor this is subspace predictive control (SPC).

References
----------
Coulson J., Lygeros J., Dörfler F. (2019), Data-Enabled Predictive Control: In the Shallows of the DeePC, ECC.
Favoreel W., De Moor B., Van Overschee P. (1999), SPC: Subspace Predictive Control, IFAC World Congress.
"""

from __future__ import annotations

from dataclasses import replace as _replace
from functools import partial

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp

from ...sysid import DataBlocksForm, InvalidParameterError, LinearPredictor, NotFittedError, check_fitted
from ...sysid.protocols import past_vector
from ._settings import _horizon, _output_target, _sqrt_weight
from ._cone_solve import LazyProblem
from .condensed import _CondensedCore, _data_terms
from ._deepc_elimination import ProjectionReduced, eliminated_qp, null_space_elimination
from .fastqp import _DenseSoftQP, _FastQP
from .plan import Plan, _ro
from ...sysid._lazy import lazy_module

cp = lazy_module("cvxpy")  # imported at the first plan that needs it (sysid/_lazy.py)

__all__ = ["DataPredictiveController"]


class DataPredictiveController(_CondensedCore):
    """Predictive control of stimulation straight from data (the direct route): DeePC or linear maps (SPC).

    Parameters
    ----------
    predictor : DataBlocksForm or LinearPredictor
        Fitted (or fitted here, on a copy, on the session given to :meth:`fit`). A predictor with
        ``data_blocks()`` (the Hankel predictor) gives DeePC on its (compressed) blocks with its regulariser and
        strengths; otherwise a predictor with linear prediction maps (``prediction_maps()``, ``has_linear_maps``;
        the least-squares predictor) gives the condensed problem on ``y = P past + F u + c`` (SPC).
    limits : StimLimits
    horizon_steps : int, optional
        ``N``; default the predictor's horizon. At most the predictor's horizon: the first blocks are used and,
        as in the predictor's ``predict``, the later future inputs are held at zero.
    past_slack_weight : float, optional
        DeePC only: ``λ_y`` of the slack on past outputs; default the predictor's ``lambda_y``; ``inf`` keeps the
        past outputs as hard equalities (for noise-free data).
    output_weight, input_weight, output_penalty, solver, fast_path, solver_options
        As in :class:`ModelPredictiveController`.

    Attributes
    ----------
    problem_ : cvxpy.Problem
    predictor_ : the fitted predictor used
    method_ : str
        ``"deepc"`` or ``"spc"`` (the linear-map formulation).
    target_kind_ : str
        Always ``"output"``.
    limits_, past_steps_, horizon_steps_, n_inputs_, n_outputs_, input_names_, output_names_

    Notes
    -----
    DeePC (Coulson, Lygeros, Dörfler 2019) with the predictor's strengths::

        min_{g,u}  ‖Yf g − r‖²_Q + ‖u‖²_R + λ_y ‖Yp g − y_past‖² + λ_g R(g) + ρ Σ s
        s.t.       Up g = u_past,  Uf g = u,  input limits,  soft output bounds on Yf g

    with ``R(g) = ‖M g‖²`` (projection), ``‖g‖²`` (l2) or ``‖g‖₁`` (l1). With ``past_slack_weight=inf`` the
    past outputs are hard equalities (no slack). The linear-map formulation (SPC, Favoreel et al. 1999) replaces
    the prediction with ``P [u_past; y_past] + F u + c``.
    """

    # per fit: DeePC's Hessian; per plan (see _free): the free response, the weighted error, the kept outputs
    _hessian = _free_memo = _ew_memo = _kept_memo = _reduced = None

    def __init__(self, *, predictor, limits, horizon_steps=None, output_weight=1.0, input_weight=1e-3,
                 past_slack_weight=None, output_penalty=1e4, solver="CLARABEL", fast_path=True,
                 solver_options=None):
        self.predictor = predictor
        self.past_slack_weight = past_slack_weight
        self.limits = limits
        self.horizon_steps = horizon_steps
        self.output_weight = output_weight
        self.input_weight = input_weight
        self.output_penalty = output_penalty
        self.solver = solver
        self.fast_path = fast_path
        self.solver_options = solver_options

    def fit(self, session=None):
        """Fit the predictor when needed (on a copy) and build the control problem once.

        Parameters
        ----------
        session : Session, optional
            Used only when ``predictor`` is not fitted yet: ``sklearn.base.clone(predictor)`` is fitted on the
            session (the given object is not modified).

        Returns
        -------
        self

        Raises
        ------
        NotFittedError
            If the predictor is not fitted and no session is given.
        InvalidParameterError
            If the predictor has neither data blocks nor linear prediction maps, or on bad settings.
        """
        method = _formulation(self.predictor)
        pred = self._fitted_predictor(session)
        self.problem_ = None
        self.predictor_, self.method_, self.target_kind_ = pred, method, "output"
        max_h = pred.max_horizon_steps_
        if self.horizon_steps is None and max_h is None:
            raise InvalidParameterError(f"the {type(pred).__name__} predicts over any horizon, so it gives the "
                                        "controller none; give horizon_steps.")
        N = _horizon(max_h if self.horizon_steps is None else self.horizon_steps, max_h)
        m, p = int(pred.n_inputs_), int(pred.n_outputs_)
        self._setup_common(tuple(pred.input_names_), tuple(pred.output_names_), N)
        self.past_steps_ = int(pred.past_steps_)
        Lq = _sqrt_weight("output_weight", self.output_weight, p)
        self._Lz = sla.block_diag(*[Lq] * N)
        self._y_off = None
        self._hessian, self._free_memo, self._ew_memo, self._kept_memo = None, None, None, None
        if method == "spc":
            maps = pred.prediction_maps(self.past_steps_, N)
            self._P, self._c = np.asarray(maps.P, np.float64), np.asarray(maps.c, np.float64)
            F = np.asarray(maps.F, np.float64)
            self._build_condensed(F, F, self._Lz)
        else:
            self._build_deepc(pred.data_blocks(), N, m, p)
        return self

    def _fitted_predictor(self, session):
        """The predictor if it is fitted, else a clone of it fitted on ``session``."""
        pred = self.predictor
        try:
            check_fitted(pred, "past_steps_")
        except NotFittedError:
            if session is None:
                raise NotFittedError(f"the {type(pred).__name__} is not fitted (or its settings changed after it was);"
                                     " fit it first or pass a session to DataPredictiveController.fit(session)."
                                     ) from None
            from sklearn.base import clone  # scikit-learn takes about 1.3 s to import: only here
            return clone(pred).fit(session)
        return pred

    def plan(self, u_past, y_past, *, target, last_input=None, use_fast_path=None) -> Plan:
        """As :meth:`ModelPredictiveController.plan`; outputs, targets and bounds in the recorded units.

        For DeePC on blocks built with ``centre_outputs`` the plan is made in the blocks' centred coordinates (past
        outputs and target less their output offset, output bounds shifted at fit) and reported back in recorded
        units. Linear maps carry their offset in ``c`` and plan in recorded units directly.
        """
        check_fitted(self, "problem_")
        off = self._y_off
        if off is None:
            return super().plan(u_past, y_past, target=target, last_input=last_input, use_fast_path=use_fast_path)
        _, y_c = self._check_past(u_past, y_past)
        tgt = self._check_target(target)
        # the whole applied past goes on: the energy budget's windows may reach further back than the prediction
        plan = super().plan(u_past, y_c - off, target=tgt - off, last_input=last_input, use_fast_path=use_fast_path)
        return _replace(plan, predicted_outputs=_ro(plan.predicted_outputs + off), target=_ro(plan.target + off))

    # ------------------------------------------------------------------------------------ DeePC
    def _build_deepc(self, b, N, m, p):
        off = np.asarray(b.output_offset, np.float64).reshape(-1)
        if off.shape == (p,) and np.any(off):  # centred blocks: plans are made in their coordinates (see plan)
            self._y_off = off
            self._ymin, self._ymax = self._ymin - np.tile(off, N), self._ymax - np.tile(off, N)
        self._Up, self._Yp = np.asarray(b.Up, np.float64), np.asarray(b.Yp, np.float64)
        Uf = np.asarray(b.Uf, np.float64)
        self._Uf, self._Yf = Uf[:m * N], np.asarray(b.Yf, np.float64)[:p * N]
        # a plan shorter than the predictor's horizon sets the later future inputs to zero, as predict() does
        self._E = np.vstack([self._Up, Uf[m * N:]])
        self._Gy = None
        r = self._Up.shape[1]
        self._lam_y = self._past_weight(b.lambda_y)
        self._reg = str(b.regularizer)
        self._lam_g = float(b.lambda_g)
        M = b.reg_matrix
        self._M = None if self._reg == "l1" else (np.eye(r) if M is None else np.asarray(M, np.float64))
        self.problem_ = LazyProblem(self, "_deepc_problem")  # cvxpy's, built where a plan needs it
        quadratic = self._reg != "l1" or self._lam_g == 0
        self._elim, self._fast, self._fast_u = None, None, None
        self._reduced = ProjectionReduced.of(self, b, N, m, p) if quadratic else None
        if quadratic:  # an energy budget is handled as in the model controller (kept only where not binding)
            self._fast_u = self._fast_deepc_eliminated(N, m)
            if self._idx_b.size == 0:
                self._fast = self._fast_u
            else:  # output bounds: the input-only QP answers where its outputs keep them, else the g-space QP
                self._fast = self._fast_deepc(N, m)
                if self._fast_u is not None and not hasattr(self._fast_u, "solve_budgeted"):
                    self._fast_u = None  # (OSQP: no dense answer to try first)
            if self._fast is None:
                self._fast = self._fast_deepc(N, m)

    def _deepc_problem(self):
        """The cvxpy problem of DeePC (DPP), built at its first use (:class:`~._cone_solve.LazyProblem`); on the
        projection regulariser's reduced form where it applies (:mod:`._deepc_elimination`)."""
        if self._reduced is not None:
            return self._reduced.cvxpy_problem(self)
        N, m, p, r = self.horizon_steps_, self.n_inputs_, self.n_outputs_, self._Up.shape[1]
        g = self._g = cp.Variable(r, name="hankel_weights")
        u = self._u = cp.Variable(N * m, name="inputs_ua")
        self._up = cp.Parameter(self._E.shape[0], name="past_inputs_and_zero_tail")
        self._yp = cp.Parameter(self._Yp.shape[0], name="past_outputs")
        self._rw = cp.Parameter(p * N, name="weighted_target")
        # the cost is divided by σ (see _core): the weighted target and the past-output slack's data are scaled
        sw = self._cost_scale_parameters()
        self._yp_cost = cp.Parameter(self._Yp.shape[0], name="past_outputs_scaled")
        cost = cp.sum_squares(sw * ((self._Lz @ self._Yf) @ g) - self._rw) + cp.sum_squares(sw * (self._Ru @ u))
        cons = [self._E @ g == self._up, self._Uf @ g == u]
        if self._lam_y is None:
            cons.append(self._Yp @ g == self._yp)
        else:
            cost = cost + self._lam_y * cp.sum_squares(sw * (self._Yp @ g) - self._yp_cost)
        if self._lam_g > 0:
            cost = cost + self._lam_g * (self._sw2 * cp.norm1(g) if self._reg == "l1"
                                         else cp.sum_squares(sw * (self._M @ g)))
        more, self._slack_var = self._common_constraints(u, lambda idx: self._Yf[idx] @ g,
                                                         self._ymax[self._idx_hi], self._ymin[self._idx_lo])
        if self._slack_var is not None:
            cost = cost + self._sw2 * (float(self.output_penalty) * cp.sum(self._slack_var))
        return cp.Problem(cp.Minimize(cost), cons + more)

    def _past_weight(self, lambda_y):
        """``λ_y`` of the past-output slack (None for hard equality): the setting, else the predictor's."""
        w = lambda_y if self.past_slack_weight is None else self.past_slack_weight
        try:
            w = float(w)
        except (TypeError, ValueError):
            w = np.nan
        if np.isnan(w) or w <= 0:
            raise InvalidParameterError(f"past_slack_weight must be > 0 (inf for hard past-output equality) or None "
                                        f"for the predictor's lambda_y; got {self.past_slack_weight!r}.")
        return None if np.isinf(w) else w

    def _deepc_hessian(self):
        """DeePC's Hessian in ``g`` and ``Lz Yf``, computed once per fit (both fast QPs are built on them)."""
        if self._hessian is None:
            self._hessian = self._hessian_of_g()
        return self._hessian

    def _hessian_of_g(self):
        LY, RU = self._Lz @ self._Yf, self._Ru @ self._Uf
        H = LY.T @ LY + RU.T @ RU
        if self._lam_y is not None:
            H = H + self._lam_y * self._Yp.T @ self._Yp
        if self._lam_g > 0:
            H = H + self._lam_g * self._M.T @ self._M
        return 0.5 * (H + H.T), LY

    def _fast_deepc_eliminated(self, N, m):
        """The QP over the inputs alone, with ``g`` minimised out in closed form (no output bounds): dense and warm
        started (daqp) where its Hessian is positive definite, else OSQP.

        For fixed ``u`` the DeePC cost is a quadratic in ``g`` under the equalities ``E g = [u_past; 0]``,
        (``Yp g = y_past`` when hard) and ``Uf g = u``; its minimiser ``g*(u)`` is affine in ``u`` and the data
        (computed once here: by structure for the projection regulariser's compressed blocks, else by the null
        space, :mod:`._deepc_elimination`), so the problem becomes an exactly equivalent QP in ``u`` of the size of
        the indirect one. Returns None when the equalities are dependent or the reduced Hessian is not positive
        definite (then the g-space fast path is used).
        """
        if self._reduced is not None:
            self._elim = self._reduced.elimination()
        else:
            H, LY = self._deepc_hessian()
            self._elim = null_space_elimination(H, LY, self._E, self._Yp, self._Uf, self._lam_y)
        return None if self._elim is None else eliminated_qp(self, self._elim["P"], N * m)

    def _solve_fast_eliminated(self, offsets, lb, ub, windows=None):
        eq, yp, rw = offsets
        e = self._elim
        bf = np.concatenate([eq, yp]) if e["hard"] else eq
        q = e["Q_r"] @ rw + e["Q_f"] @ bf
        if not e["hard"]:
            q += e["Q_y"] @ yp
        lo, hi = [lb.reshape(-1)], [ub.reshape(-1)]
        if self._slew_rows is not None:
            lo.append(-self._slew_rows[1])
            hi.append(self._slew_rows[1])
        lo, hi = np.concatenate(lo), np.concatenate(hi)
        qp = self._fast_u
        u, status, reason = qp.solve(q, lo, hi) if windows is None else qp.solve_budgeted(q, lo, hi, windows)
        if u is None:
            return None, None, status, reason
        if "g_of" in e:
            return u, e["g_of"](u, eq, yp, rw), status, ""
        g = e["G_r"] @ rw + e["G_f"] @ bf + e["G_u"] @ u
        if not e["hard"]:
            g += e["G_y"] @ yp
        return u, g, status, ""

    def _outputs_kept(self, g) -> bool:
        """Whether the predicted outputs ``Yf g`` keep every output bound (exactly, no tolerance)."""
        y = self._Yf @ g
        self._kept_memo = (g, y)  # the plan's predicted outputs, should g be the plan's answer (_predict_outputs)
        return bool((y[self._idx_hi] <= self._ymax[self._idx_hi]).all()
                    and (y[self._idx_lo] >= self._ymin[self._idx_lo]).all())

    def _fast_deepc(self, N, m):
        """The QP over ``z = [g; s]`` with ``u = Uf g`` substituted: dense and warm started where it applies (the
        soft output bounds held hard when that is their optimum, :class:`~.fastqp._DenseSoftQP`), else OSQP; on the
        projection regulariser's reduced form, the QP over ``[u; ξ; t]`` (:mod:`._deepc_elimination`)."""
        if self._reduced is not None:
            return self._reduced.bounded_qp(self)
        r, nb = self._Up.shape[1], self._idx_b.size
        H, LY = self._deepc_hessian()
        self._LY = LY
        P = sp.block_diag([sp.csc_matrix(2.0 * H), sp.csc_matrix((nb, nb))], format="csc")
        rows = [sp.hstack([sp.csr_matrix(self._E), sp.csr_matrix((self._E.shape[0], nb))])]
        if self._lam_y is None:
            rows.append(sp.hstack([sp.csr_matrix(self._Yp), sp.csr_matrix((self._Yp.shape[0], nb))]))
        rows += self._box_rows(sp.hstack([sp.csr_matrix(self._Uf), sp.csr_matrix((N * m, nb))]))
        if self._idx_hi.size:
            rows.append(sp.hstack([sp.csr_matrix(self._Yf[self._idx_hi]), -self._S_hi / self._kappa]))
        if self._idx_lo.size:
            rows.append(sp.hstack([sp.csr_matrix(self._Yf[self._idx_lo]), self._S_lo / self._kappa]))
        if nb:
            rows.append(sp.hstack([sp.csr_matrix((nb, r)), sp.eye(nb)]))
        A = sp.vstack(rows, format="csc")
        osqp = _FastQP(P, A, r + nb)
        n_eq = self._E.shape[0] + (self._Yp.shape[0] if self._lam_y is None else 0)
        eq = np.arange(A.shape[0]) < n_eq  # E g = [u_past; 0] (and Yp g = y_past when hard): always equal bounds
        return _DenseSoftQP.around(osqp, P, A, r, eq_rows=eq) or osqp

    # ------------------------------------------------------------------------------------ per plan
    def _check_target(self, target):
        return _output_target(np.asarray(target, dtype=np.float64), self.horizon_steps_, self.n_outputs_)

    def _target_rows(self, target):
        return target

    def _free(self, u_past, y_past):
        """Free response ``P past + c`` of the linear maps (the outputs with zero future inputs).

        Computed once per plan: the steps of one plan (offsets, predicted outputs, cost terms) get the same past
        windows, the same objects (:meth:`_core._PredictiveController.plan`; each plan slices new ones), and the last
        windows are held with their answer so their identities stay theirs.
        """
        memo = self._free_memo
        if memo is not None and memo[0] is u_past and memo[1] is y_past:
            return memo[2]
        fy = self._P @ past_vector(u_past, y_past) + self._c
        self._free_memo = (u_past, y_past, fy)
        return fy

    def _offsets(self, u_past, y_past, target):
        r = target.reshape(-1)
        if self.method_ == "spc":
            fy = self._free(u_past, y_past)
            ew = self._Lz @ (fy - r)
            self._ew_memo = (u_past, y_past, target, ew)  # for the plan's cost terms (as _free)
            return ew, None, fy
        eq = np.concatenate([u_past.reshape(-1), np.zeros(self._E.shape[0] - self._Up.shape[0])])
        return eq, y_past.reshape(-1), self._Lz @ r

    def _assign(self, offsets):
        if self.method_ == "spc":
            return super()._assign(offsets)
        if self._reduced is not None:
            return self._reduced.assign(self, offsets)
        up, yp, rw = offsets
        self._up.value, self._yp.value, self._rw.value = up, yp, self._cost_sw * rw
        self._yp_cost.value = self._cost_sw * yp

    def _cost_magnitude(self, offsets):
        """DeePC: the cost at ``g = 0`` (tracking and past-output terms), an upper bound on what a plan can gain."""
        if self.method_ == "spc":
            return super()._cost_magnitude(offsets)
        _, yp, rw = offsets
        return float(rw @ rw) + (0.0 if self._lam_y is None else self._lam_y * float(yp @ yp))

    def _aux_value(self):
        if self._reduced is not None:
            return self._reduced.aux_value(self)
        return None if self.method_ == "spc" else np.array(self._g.value)

    def _solve_fast(self, offsets, lb, ub, windows=None):
        if self.method_ == "spc":
            return super()._solve_fast(offsets, lb, ub, windows)
        if self._elim is not None and self._fast_u is not None:
            # The input-only QP is DeePC without its output bounds, exactly (g minimised out in closed form). Where
            # its answer keeps every output bound it is feasible for the problem with them (slack zero) and optimal
            # for a relaxation of it, so it is that problem's optimum (convex; common practice, no source); the
            # g-space QP is solved only where an output bound would be broken.
            res = self._solve_fast_eliminated(offsets, lb, ub, windows)
            if self._fast is self._fast_u or (res[0] is not None and self._outputs_kept(res[1])):
                return res
        if self._reduced is not None:
            return self._reduced.solve_bounded(self, self._fast, offsets, lb, ub, windows)
        up, yp, rw = offsets
        r, nb = self._Up.shape[1], self._idx_b.size
        q = -2.0 * self._LY.T @ rw
        if self._lam_y is not None:
            q = q - 2.0 * self._lam_y * self._Yp.T @ yp
        q = np.concatenate([q, np.full(nb, float(self.output_penalty) / self._kappa)])  # t = κ·s (_setup_common)
        eq = [up] if self._lam_y is not None else [up, yp]  # E g = [u_past; 0] (and Yp g = y_past when hard)
        lo, hi = self._row_bounds(lb, ub)
        lo, hi = np.concatenate(eq + lo), np.concatenate(eq + hi)
        z, status, reason = (self._fast.solve(q, lo, hi) if windows is None
                             else self._fast.solve_budgeted(q, lo, hi, windows, self._Uf))
        if z is None:
            return None, None, status, reason
        g = z[:r]
        return self._Uf @ g, g, status, ""

    def _predict_outputs(self, u, aux, u_past, y_past):
        N, p = self.horizon_steps_, self.n_outputs_
        if self.method_ == "spc":
            y = self._free(u_past, y_past) + self._Gy @ u.reshape(-1)
        elif aux is not None:
            memo = self._kept_memo
            y = memo[1] if memo is not None and memo[0] is aux else self._Yf @ aux  # (as _outputs_kept made it)
        else:  # the predictor takes recorded units; the plan's y_past is centred when it has an offset
            off = 0.0 if self._y_off is None else self._y_off
            return np.asarray(self.predictor_.predict(u_past, y_past + off, u), np.float64).reshape(N, p) - off
        return y.reshape(N, p)

    def _cost_terms(self, u, aux, y, u_past, y_past, target):
        if self.method_ != "spc":
            return self._cost_terms_later(u, aux, y, u_past, y_past, target)()
        memo, r = self._ew_memo, target.reshape(-1)
        if memo is not None and memo[0] is u_past and memo[1] is y_past and memo[2] is target:
            return self._condensed_terms(u, memo[3], None)
        return self._condensed_terms(u, self._Lz @ (self._free(u_past, y_past) - r), None)

    def _cost_terms_later(self, u, aux, y, u_past, y_past, target):
        """DeePC's terms at the first read of ``Plan.cost_terms`` (a quarter of a plan's time, computed at once), of
        this plan's arrays (copied where a caller may refill them) and of matrices a refit replaces, never changes."""
        if self.method_ == "spc":  # from its solve's offsets, now
            return super()._cost_terms_later(u, aux, y, u_past, y_past, target)
        return partial(_data_terms, self._Lz, self._Ru, u, y, np.array(target, np.float64).reshape(-1),
                       None if aux is None else np.array(aux, np.float64), np.array(y_past, np.float64).reshape(-1),
                       self._Yp, self._lam_y, self._lam_g, None if self._reg == "l1" else self._M)


def _formulation(predictor) -> str:
    """``"deepc"`` for a predictor with data blocks, ``"spc"`` for one with linear prediction maps."""
    if isinstance(predictor, DataBlocksForm):
        return "deepc"
    if isinstance(predictor, LinearPredictor) and predictor.has_linear_maps:
        return "spc"
    raise InvalidParameterError(
        f"the data predictive controller needs a predictor with data_blocks() (DeePC) or with linear prediction maps "
        f"(prediction_maps() and has_linear_maps True); got a {type(predictor).__name__}, {_lacks(predictor)}. "
        "Give a fitted LsqPredictor or HankelPredictor, or a predictor implementing the LinearPredictor protocol "
        "(stimsteer.sysid.protocols)."
    )


def _lacks(obj) -> str:
    """What ``obj`` lacks of the linear-predictor protocol, in words (for error messages)."""
    members = ("predict", "predict_many", "rest_window", "prediction_maps")
    missing = [f"{name}()" for name in members if not callable(getattr(obj, name, None))]
    if missing:
        return "which has no " + ", ".join(missing)
    if not hasattr(obj, "has_linear_maps"):
        return "which declares no has_linear_maps"
    return "whose has_linear_maps is False and which has no data_blocks()"
