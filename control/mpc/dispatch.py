"""Which controller for which predictor: :func:`controller_for`, on the predictor contract alone.

The order is that of :mod:`stimsteer.sysid.protocols`: a state-space form first (the model predictive controller),
then data blocks (DeePC), then linear prediction maps (the condensed problem on ``y = P past + F u + c``). The
concrete class of the predictor is never looked at, so a new route that implements a capability gets a controller.
"""

from __future__ import annotations

from ...sysid import DataBlocksForm, InvalidParameterError, LinearPredictor, StateSpaceForm
from ...sysid.protocols import InputAffineForm, RecruitmentForm
from .data import DataPredictiveController, _lacks
from .model import ModelPredictiveController

__all__ = ["controller_for"]


def controller_for(predictor, limits, *, horizon_steps=None, output_weight=1.0, input_weight=1e-3, **settings):
    """The right fitted controller for a fitted predictor of either route.

    Parameters
    ----------
    predictor : StateSpaceForm, DataBlocksForm or LinearPredictor
        A state-space model or an estimator with ``state_space_model()`` (ridge ARX, subspace identification),
        a predictor with ``data_blocks()`` (the Hankel predictor), or one with linear prediction maps (the
        least-squares predictor, or any implementation of :class:`~stimsteer.sysid.LinearPredictor`).
    limits : StimLimits
    horizon_steps : int, optional
        Required for state-space forms; default the predictor's horizon for data predictors.
    output_weight, input_weight
        As in :class:`ModelPredictiveController`.
    **settings
        Further keyword settings of the controller class (documented there).

    Returns
    -------
    ModelPredictiveController or DataPredictiveController
        Fitted (its problem built). For a state-space form, the model is ``predictor.state_space_model()`` and the
        output offset (unless given in ``settings``) is ``model.info["output_offset"]`` where the model has one.

    Raises
    ------
    InvalidParameterError
        For a state-space form without ``horizon_steps``, or an object with none of the three capabilities (the
        message names what it lacks).
    """
    if isinstance(predictor, StateSpaceForm):
        model = predictor.state_space_model()
        if horizon_steps is None:
            raise InvalidParameterError("a state-space model has no horizon of its own; give horizon_steps "
                                        "(--horizon-steps).")
        settings.setdefault("output_offset", model.info.get("output_offset"))  # e.g. RidgeArx's resting output
        return ModelPredictiveController(model=model, limits=limits, horizon_steps=horizon_steps,
                                         output_weight=output_weight, input_weight=input_weight, **settings).fit()
    if isinstance(predictor, DataBlocksForm) or (isinstance(predictor, LinearPredictor)
                                                 and predictor.has_linear_maps):
        return DataPredictiveController(predictor=predictor, limits=limits, horizon_steps=horizon_steps,
                                        output_weight=output_weight, input_weight=input_weight, **settings).fit()
    if isinstance(predictor, InputAffineForm):  # the lifted route: F fixed, free response from the past
        from .lifted import InputAffinePredictiveController
        return InputAffinePredictiveController(predictor=predictor, limits=limits, horizon_steps=horizon_steps,
                                               output_weight=output_weight, input_weight=input_weight,
                                               **settings).fit()
    if isinstance(predictor, RecruitmentForm):  # Hammerstein: plan in the transformed input, decode amplitudes
        from .recruitment import RecruitmentController, recruited_limits
        inner = controller_for(predictor.linear_part(), recruited_limits(predictor, limits),
                               horizon_steps=horizon_steps, output_weight=output_weight, input_weight=input_weight,
                               **settings)
        return RecruitmentController(predictor=predictor, limits=limits, inner=inner).fit()
    raise InvalidParameterError(
        f"controller_for needs a predictor with state_space_model() (a state-space form), data_blocks() (Hankel "
        f"blocks) or prediction_maps() with has_linear_maps True (linear maps); got a {type(predictor).__name__}, "
        f"{_lacks(predictor)} and no state_space_model(). Fit a route of stimsteer.sysid, or implement one of the "
        "protocols of stimsteer.sysid.protocols."
    )
