"""Offset-free tracking for either route: a disturbance-augmented estimator and a steady-state target correction.

A fitted controller of either route plans with a model of the stimulated response; a constant or slowly drifting
offset between that model and the recording (electrode drift, a baseline shift, a gain error) leaves a steady
tracking error. :class:`OffsetFreeController` wraps any fitted controller (through its public ``plan`` alone, so
the model route, DeePC and SPC alike) and removes it, after Muske & Badgwell (2002) and Pannocchia & Rawlings
(2003):

* **Disturbance model.** The measured output is the model's output plus an output disturbance ``d``, either
  constant (``d⁺ = d``, ``"constant"``) or a ramp (``d⁺ = d + v``, ``v⁺ = v``, ``"ramp"``, for slow drift). It is
  estimated from the one-step prediction error ``e_k = y_k − ŷ_{k|k−1}`` (the previous plan's first predicted output
  under the input actually delivered): ``d̂ ← d̂ + L e`` (and ``v̂ ← v̂ + L_v e``). With ``L = 1`` and the constant
  model this is the prediction-error bias of DMC-type controllers (Muske & Badgwell 2002, Sec. 3).
* **Augmented prediction.** The wrapped controller plans in the model's world: the past outputs it sees are
  ``y − d̂`` (each past sample with the disturbance estimated at its time), and its target ``r − d̂`` over the
  horizon; the plan's predicted outputs are returned with ``d̂`` added back.
* **Target correction.** A controller that penalises the input itself (``‖u‖²_R``) settles at a compromise short of
  its target even for an exact model. The steady-state target the regulator must be given so that its first
  predicted output equals ``r`` is found by a fixed-point iteration across samples: ``ξ ← ξ + κ (r − ŷ_0)``, the
  regulator's target being ``r − d̂ + ξ``.

At any steady state of the closed loop (constant inputs, outputs and estimates, no binding limit) the updates stop
only when ``e = 0`` and ``ŷ_0 = r``, so ``y = ŷ_0 = r``: the output has no offset, whatever the constant
disturbance (the argument of Pannocchia & Rawlings 2003, Sec. 3: as many integrating disturbances as outputs).
A ramp model also removes the lag a constant model leaves behind a linear drift. Hard limits are those of the
wrapped controller, untouched (its plans are returned as they are); soft output bounds apply to the model's
prediction without the disturbance estimate.

References
----------
Muske K.R., Badgwell T.A. (2002), Disturbance modeling for offset-free linear model predictive control, J. Process
Control 12:617–632.
Pannocchia G., Rawlings J.B. (2003), Disturbance models for offset-free model-predictive control, AIChE J.
49:426–437.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ...sysid import InvalidParameterError, SessionError, check_fitted

__all__ = ["OffsetFreeController", "DISTURBANCE_MODELS"]

DISTURBANCE_MODELS = ("constant", "ramp")


def _gain(name, value, p, upper):
    g = np.asarray(value, dtype=np.float64)
    g = np.full(p, float(g)) if g.ndim == 0 else g
    if g.shape != (p,) or not np.all(np.isfinite(g)) or np.any(g < 0) or np.any(g > upper):
        raise InvalidParameterError(f"{name} must be a number or {p} numbers in [0, {upper:g}]; got {value!r}.")
    return g


class OffsetFreeController:
    """A fitted controller of either route made offset-free (see the module docstring).

    Parameters
    ----------
    controller : a fitted controller of :mod:`stimsteer.control.mpc`
        Used through ``plan``, ``reset`` and its fitted attributes (which this object passes on: ``limits_``,
        ``past_steps_``, ``horizon_steps_``, ``n_inputs_``, ``n_outputs_``, ...). Output targets only.
    disturbance_model : {"constant", "ramp"}, default "constant"
    disturbance_gain : float or ndarray (n_outputs,), default 0.5
        ``L`` in (0, 1]: the share of each prediction error taken into ``d̂`` (1: all of it, the DMC bias).
    drift_gain : float or ndarray (n_outputs,), optional
        ``L_v`` of the ramp model; default ``L² / (2 − L)``, the critically damped choice of an alpha-beta filter.
    target_gain : float, default 0.3
        ``κ`` of the target correction in [0, 1]; 0 leaves it off (then the output is offset-free only when the
        regulator meets its own target at steady state, e.g. without input weight).

    Attributes
    ----------
    controller_ : the wrapped controller
    disturbance_ : ndarray (n_outputs,)
        ``d̂`` predicted for the sample the last plan's first input goes to.
    drift_ : ndarray (n_outputs,)
        ``v̂`` per sample (zeros for the constant model).
    target_shift_ : ndarray (n_outputs,)
        ``ξ``.
    innovation_ : ndarray (n_outputs,)
        The last prediction error used (NaN before the first).

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.sysid import StateSpaceModel
    >>> from stimsteer.control.limits import StimLimits
    >>> from stimsteer.control.mpc import ModelPredictiveController
    >>> ctrl = ModelPredictiveController(model=StateSpaceModel(A=[[0.5]], B=[[1.0]], C=[[1.0]]), horizon_steps=5,
    ...     limits=StimLimits(amplitude_min_ua=-5, amplitude_max_ua=5, n_inputs=1)).fit()
    >>> free = OffsetFreeController(ctrl)
    >>> plan = free.plan(np.zeros((1, 1)), np.zeros((1, 1)), target=[1.0])
    >>> bool(plan.ok)
    True
    """

    def __init__(self, controller, *, disturbance_model="constant", disturbance_gain=0.5, drift_gain=None,
                 target_gain=0.3):
        check_fitted(controller, "problem_")
        if getattr(controller, "target_kind_", "output") != "output":
            raise InvalidParameterError("offset-free tracking follows output targets; the controller plans towards "
                                        "a state (target_kind='state'). Use an output target.")
        if disturbance_model not in DISTURBANCE_MODELS:
            raise InvalidParameterError(f"disturbance_model must be one of {list(DISTURBANCE_MODELS)}; got "
                                        f"{disturbance_model!r}.")
        p = int(controller.n_outputs_)
        L = _gain("disturbance_gain", disturbance_gain, p, 1.0)
        if np.any(L <= 0):
            raise InvalidParameterError(f"disturbance_gain must be positive (0 would never update the estimate); "
                                        f"got {disturbance_gain!r}.")
        Lv = L**2 / (2.0 - L) if drift_gain is None else _gain("drift_gain", drift_gain, p, 1.0)
        if disturbance_model == "constant":
            Lv = np.zeros(p)
        self.controller_, self.disturbance_model = controller, disturbance_model
        self._L, self._Lv = L, Lv
        self._kappa = float(_gain("target_gain", target_gain, 1, 1.0)[0])
        self.reset()

    def __getattr__(self, name):
        # the fitted attributes of the wrapped controller (limits_, past_steps_, ...) are this object's too
        if name.endswith("_") and not name.startswith("_") and "controller_" in self.__dict__:
            return getattr(self.__dict__["controller_"], name)
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")

    def reset(self):
        """Forget the estimates and the wrapped controller's warm start (a new run starts from zero offset)."""
        p = int(self.controller_.n_outputs_)
        self.disturbance_, self.drift_, self.target_shift_ = np.zeros(p), np.zeros(p), np.zeros(p)
        self.innovation_ = np.full(p, np.nan)
        self._expect = None  # (predicted y_k with the disturbance, the input planned for sample k)
        self.controller_.reset()
        return self

    def _update(self, u_past, y_past):
        """Take the prediction error of the newest past sample into the estimates (when it is a valid one)."""
        if self._expect is None:
            return
        y_hat, u_planned = self._expect
        self._expect = None
        y, u = y_past[-1], u_past[-1]
        scale = max(1.0, float(np.max(np.abs(u_planned))))
        # a held, replaced or missing sample is not what the prediction assumed: no innovation from it
        if not (np.all(np.isfinite(y)) and np.all(np.abs(u - u_planned) <= 1e-9 * scale)):
            return
        e = y - y_hat
        self.innovation_ = e
        self.disturbance_ = self.disturbance_ + self._L * e
        self.drift_ = self.drift_ + self._Lv * e

    def plan(self, u_past, y_past, *, target, last_input=None, use_fast_path=None):
        """Plan as the wrapped controller does, with the disturbance estimate and the target correction.

        Parameters
        ----------
        u_past, y_past, target, last_input, use_fast_path
            As for the wrapped controller's ``plan`` (output targets; the windows end at the newest sample).

        Returns
        -------
        Plan
            The wrapped controller's plan, its predicted outputs with ``d̂`` added and its target the one given.

        Raises
        ------
        SessionError
            On malformed windows or target (as the wrapped controller).
        """
        c = self.controller_
        u_past = np.asarray(u_past, dtype=np.float64)
        y_past = np.asarray(y_past, dtype=np.float64)
        p, N = int(c.n_outputs_), int(c.horizon_steps_)
        if y_past.ndim != 2 or y_past.shape[1] != p or u_past.ndim != 2 or u_past.shape[0] < 1:
            return c.plan(u_past, y_past, target=target, last_input=last_input, use_fast_path=use_fast_path)
        r = np.asarray(target, dtype=np.float64)
        rows = np.tile(r, (N, 1)) if r.ndim == 1 and r.shape == (p,) else r[:N] if r.ndim == 2 else None
        if rows is None or rows.shape != (N, p):
            raise SessionError(f"an offset-free plan needs an output target of shape ({p},) or (>= {N}, {p}); got "
                               f"{r.shape}.")
        self._update(u_past, y_past)
        back = np.arange(y_past.shape[0])[::-1][:, None]  # samples before the newest past sample
        ahead = np.arange(1, N + 1)[:, None]
        d_past = self.disturbance_ - back * self.drift_
        d_future = self.disturbance_ + ahead * self.drift_
        inner = c.plan(u_past, y_past - d_past, target=rows - d_future + self.target_shift_, last_input=last_input,
                       use_fast_path=use_fast_path)
        y_hat = inner.predicted_outputs + d_future
        if np.all(np.isfinite(y_hat[0])):
            self.target_shift_ = self.target_shift_ + self._kappa * (rows[0] - y_hat[0])
            self._expect = (y_hat[0].copy(), np.asarray(inner.inputs[0], np.float64).copy())
        self.disturbance_ = self.disturbance_ + self.drift_  # the estimate moves on to the planned sample
        return dataclasses.replace(inner, predicted_outputs=_ro(y_hat), target=_ro(rows))


def _ro(a):
    a = np.array(a, dtype=np.float64, copy=True)
    a.setflags(write=False)
    return a
