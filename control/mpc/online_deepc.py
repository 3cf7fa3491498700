"""DeePC whose data grow as trials arrive: :class:`OnlineDeePC`.

The data are an :class:`~stimsteer.sysid.online_hankel.OnlineHankelPredictor` (the compressed Hankel matrix updated
by block QR, of fixed size whatever the number of trials); after an update the
:class:`~stimsteer.control.mpc.DataPredictiveController` is rebuilt on its blocks before the next plan (the
problem's size does not grow with the data, so neither does the rebuild). Its plans equal those of a DeePC controller
built from scratch on a :class:`~stimsteer.sysid.datadriven.HankelPredictor` fitted on all the trials so far with
the same one strength.
"""

from __future__ import annotations

from ...sysid import InvalidParameterError, NotFittedError
from ...sysid.online_hankel import OnlineHankelPredictor
from .data import DataPredictiveController

__all__ = ["OnlineDeePC"]


class OnlineDeePC:
    """A DeePC controller that takes trials in as they arrive (see the module docstring).

    Parameters
    ----------
    data : OnlineHankelPredictor
        Updated here by :meth:`update` (it may already hold data).
    limits : StimLimits
    horizon_steps, output_weight, input_weight, past_slack_weight, output_penalty, solver, fast_path,
    solver_options
        As in :class:`DataPredictiveController`.

    Attributes
    ----------
    controller_ : DataPredictiveController
        The controller on the data so far (rebuilt on first use after an update).
    n_rebuilds_ : int

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.control.limits import StimLimits
    >>> from stimsteer.sysid.online_hankel import OnlineHankelPredictor
    >>> rng = np.random.default_rng(0)
    >>> ctrl = OnlineDeePC(data=OnlineHankelPredictor(past_steps=2, horizon_steps=3, lambda_g=1e-3),
    ...                    limits=StimLimits(amplitude_min_ua=-1, amplitude_max_ua=1, n_inputs=1))
    >>> u = rng.uniform(-1, 1, size=(80, 1))
    >>> _ = ctrl.update(u, np.convolve(u[:, 0], [0.0, 1.0, 0.5])[:80, None])
    >>> ctrl.plan(np.zeros((2, 1)), np.zeros((2, 1)), target=[0.5]).inputs.shape
    (3, 1)
    """

    def __init__(self, *, data, limits, horizon_steps=None, output_weight=1.0, input_weight=1e-3,
                 past_slack_weight=None, output_penalty=1e4, solver="CLARABEL", fast_path=True, solver_options=None):
        if not isinstance(data, OnlineHankelPredictor):
            raise InvalidParameterError(f"data must be an OnlineHankelPredictor; got {type(data).__name__}.")
        self.data = data
        self._settings = dict(limits=limits, horizon_steps=horizon_steps, output_weight=output_weight,
                              input_weight=input_weight, past_slack_weight=past_slack_weight,
                              output_penalty=output_penalty, solver=solver, fast_path=fast_path,
                              solver_options=solver_options)
        self._ctrl, self.n_rebuilds_ = None, 0

    def update(self, u, y, *, new_trial=True):
        """Take new samples in (as :meth:`OnlineHankelPredictor.update`); the next plan uses them.

        Returns
        -------
        self
        """
        self.data.update(u, y, new_trial=new_trial)
        self._ctrl = None
        return self

    @property
    def controller_(self) -> DataPredictiveController:
        if self._ctrl is None:
            if getattr(self.data, "n_columns_", 0) == 0:
                raise NotFittedError("the online DeePC controller has no data yet; update it with a trial first.")
            self._ctrl = DataPredictiveController(predictor=self.data, **self._settings).fit()
            self.n_rebuilds_ += 1
        return self._ctrl

    def __getattr__(self, name):
        # the fitted attributes of the current controller are this object's too (a live runner reads them)
        if name.endswith("_") and not name.startswith("_") and "_ctrl" in self.__dict__:
            return getattr(self.controller_, name)
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")

    def reset(self):
        """Forget the applied past of the current controller (its energy windows and warm start)."""
        self.controller_.reset()
        return self

    def plan(self, u_past, y_past, *, target, last_input=None, use_fast_path=None):
        """As :meth:`DataPredictiveController.plan`, on the data so far."""
        return self.controller_.plan(u_past, y_past, target=target, last_input=last_input,
                                     use_fast_path=use_fast_path)
