"""Base classes of every estimator, predictor, scaler and controller: the scikit-learn habits in one place.

* The constructor takes keyword-only settings and stores each unchanged under its own name; nothing else.
* :meth:`BaseEstimator.get_params` and :meth:`BaseEstimator.set_params` are derived from the constructor's
  signature, as scikit-learn derives them, so ``sklearn.base.clone`` rebuilds an equal unfitted object.
* Fitted state lives only in attributes ending in ``_``. :func:`check_fitted` refuses an object that was never
  fitted, and one whose settings were changed by ``set_params`` after it was fitted (its fitted state no longer
  matches its settings: fit it again).
* :class:`BasePredictor` adds the one window check and the one output-offset rule of every predictor, with
  ``predict`` defined as ``predict_many`` of a single window.

References
----------
Buitinck L. et al. (2013), API design for machine learning software: experiences from the scikit-learn project,
ECML PKDD Workshop.
"""

from __future__ import annotations

import functools
import inspect

import numpy as np

from ._windows import window_batch
from .exceptions import InvalidParameterError, NotFittedError, SessionError

__all__ = ["BaseEstimator", "BasePredictor", "check_fitted"]

_MAX_REPR = 60


def _same(a, b) -> bool:
    """Whether two setting values are the same (arrays by value, other objects by identity or ``==``)."""
    if a is b:
        return True
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        try:
            return bool(np.array_equal(np.asarray(a), np.asarray(b)))
        except (TypeError, ValueError):
            return False
    try:
        return bool(a == b)
    except (TypeError, ValueError):
        return False


def _short(value) -> str:
    if isinstance(value, np.ndarray):
        return f"array{value.shape}"
    text = repr(value)
    return text if len(text) <= _MAX_REPR else text[:_MAX_REPR - 3] + "..."


class BaseEstimator:
    """Settings from the constructor signature, a readable ``repr``, and a guard on stale fitted state.

    Subclasses declare their settings as keyword-only constructor arguments and store each under its own name.
    A subclass's ``fit`` is wrapped once (at class creation) so that a successful fit records the settings it
    was made with; :func:`check_fitted` compares them with the current ones.
    """

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        fit = cls.__dict__.get("fit")
        if fit is not None and not getattr(fit, "_records_settings", False):
            @functools.wraps(fit)
            def fit_and_record(self, *args, **kw):
                # During fit the object's own fitted-state helpers may run (check_fitted included): the settings
                # changed before this fit are the ones it fits with. A failed fit keeps the object refused.
                stale = getattr(self, "_changed_since_fit", ())
                self._changed_since_fit = ()
                try:
                    result = fit(self, *args, **kw)
                except BaseException:
                    self._changed_since_fit = stale
                    raise
                self._mark_fitted()
                return result

            fit_and_record._records_settings = True
            cls.fit = fit_and_record

    @classmethod
    def _param_names(cls) -> tuple[str, ...]:
        sig = inspect.signature(cls.__init__)
        names = []
        for name, par in sig.parameters.items():
            if name == "self" or par.kind in (par.VAR_POSITIONAL, par.VAR_KEYWORD):
                continue
            names.append(name)
        return tuple(names)

    def get_params(self, deep: bool = True) -> dict:
        """Constructor settings, unchanged; with ``deep``, also ``name__setting`` of settings that are estimators."""
        out = {}
        for name in self._param_names():
            value = getattr(self, name)
            if deep and isinstance(value, BaseEstimator):
                out.update({f"{name}__{k}": v for k, v in value.get_params(deep=True).items()})
            out[name] = value
        return out

    def set_params(self, **params):
        """Change settings (``name=value`` or ``name__setting=value`` for a nested estimator); returns ``self``.

        Raises
        ------
        InvalidParameterError
            For a name that is not a setting of this class (the valid names are listed).
        """
        valid = self._param_names()
        nested: dict[str, dict] = {}
        for key, value in params.items():
            name, _, sub = key.partition("__")
            if name not in valid:
                raise InvalidParameterError(f"{type(self).__name__} has no setting {name!r}; valid settings: "
                                            f"{', '.join(valid)}.")
            if sub:
                nested.setdefault(name, {})[sub] = value
                continue
            if not _same(getattr(self, name), value):
                self._note_changed(name)
            setattr(self, name, value)
        for name, sub_params in nested.items():
            inner = getattr(self, name)
            if not isinstance(inner, BaseEstimator):
                raise InvalidParameterError(f"{type(self).__name__}.{name} is not an estimator; it has no settings "
                                            f"{sorted(sub_params)}.")
            inner.set_params(**sub_params)
            self._note_changed(name)
        return self

    def _note_changed(self, name: str) -> None:
        if getattr(self, "_fitted_settings", None) is not None:
            self._changed_since_fit = tuple(dict.fromkeys((*getattr(self, "_changed_since_fit", ()), name)))

    def _mark_fitted(self) -> None:
        """Record that the fitted state matches the current settings (called after ``fit`` and by loaders)."""
        self._fitted_settings = True
        self._changed_since_fit = ()

    def __repr__(self) -> str:
        sig = inspect.signature(type(self).__init__)
        parts = []
        for name in self._param_names():
            value = getattr(self, name)
            default = sig.parameters[name].default
            if default is not inspect.Parameter.empty and _same(value, default):
                continue
            parts.append(f"{name}={_short(value)}")
        return f"{type(self).__name__}({', '.join(parts)})"


def check_fitted(obj, attribute: str) -> None:
    """Raise :class:`NotFittedError` unless ``obj`` is fitted and its settings are those it was fitted with.

    Parameters
    ----------
    obj : object
    attribute : str
        A fitted attribute (ending in ``_``) that exists only after ``fit``.
    """
    name = type(obj).__name__
    if getattr(obj, attribute, None) is None:
        raise NotFittedError(f"this {name} is not fitted yet; call {name}.fit(...) before using it.")
    changed = getattr(obj, "_changed_since_fit", ())
    if changed:
        raise NotFittedError(f"the settings {', '.join(changed)} of this {name} changed after it was fitted, so its "
                             f"fitted state no longer matches them; call {name}.fit(...) again before using it.")


class BasePredictor(BaseEstimator):
    """A predictor of future outputs from a past window and future inputs (see :mod:`stimsteer.sysid.protocols`).

    Subclasses implement ``predict_many`` on batches and set the fitted attributes ``past_steps_``,
    ``max_horizon_steps_`` (``None`` for any horizon), ``n_inputs_``, ``n_outputs_``, ``input_names_``,
    ``output_names_``, ``input_units_``, ``output_units_`` and, where the outputs were centred,
    ``output_offset_``. ``predict`` is ``predict_many`` of one window.
    """

    #: True when the predictor is affine in its past window and future inputs and implements ``prediction_maps``.
    has_linear_maps: bool = True

    def _offset(self) -> np.ndarray:
        """The one output-offset rule: ``output_offset_`` where the outputs were centred, zeros otherwise."""
        off = getattr(self, "output_offset_", None)
        return np.zeros(int(self.n_outputs_)) if off is None else np.asarray(off, dtype=np.float64)

    def _window(self, u_past, y_past, u_future):
        """Check one window and return it as a batch of one, float64, shapes (1, n, channels)."""
        check_fitted(self, "past_steps_")
        m, p = int(self.n_inputs_), int(self.n_outputs_)
        arrays = []
        for name, a, c in (("u_past", u_past, m), ("y_past", y_past, p), ("u_future", u_future, m)):
            a = np.asarray(a, dtype=np.float64)
            a = a[:, None] if a.ndim == 1 and c == 1 else a
            if a.ndim != 2 or a.shape[1] != c:
                raise SessionError(f"{name} must have shape (n_samples, {c}); got {a.shape}.")
            arrays.append(a[None])
        return tuple(arrays)

    def _check_batch(self, u_past, y_past, u_future):
        """The one check of a batch of windows, shapes (n_windows, n_samples, channels), as float64 copies.

        Refuses an unfitted predictor, wrong shapes, NaN or inf, a past shorter than ``past_steps_`` and, where
        ``max_horizon_steps_`` is set, a future longer than it (or empty).
        """
        check_fitted(self, "past_steps_")
        up, yp, uf = window_batch(u_past, y_past, u_future, n_inputs=int(self.n_inputs_),
                                  n_outputs=int(self.n_outputs_), min_past=int(self.past_steps_))
        N = self.max_horizon_steps_
        if N is not None and not 1 <= uf.shape[1] <= int(N):
            raise SessionError(f"u_future must hold 1 to max_horizon_steps_ = {N} samples per window; got "
                               f"{uf.shape[1]}. Refit with a longer horizon_steps or predict in pieces.")
        return up, yp, uf

    def predict(self, u_past, y_past, u_future) -> np.ndarray:
        """Predicted outputs over ``u_future``, shape (n_future, n_outputs), from one past window.

        Parameters
        ----------
        u_past : ndarray, shape (n_past, n_inputs)
            Inputs before the prediction; the last ``past_steps_`` samples are used.
        y_past : ndarray, shape (n_past, n_outputs)
            Outputs at the same samples.
        u_future : ndarray, shape (n_future, n_inputs)
            Inputs over the prediction, at most ``max_horizon_steps_`` samples when that is set.
        """
        return self.predict_many(*self._window(u_past, y_past, u_future))[0]
