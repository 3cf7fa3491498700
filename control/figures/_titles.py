"""What a figure's title names: the route and method a saved model was fitted with (every title names its model)."""

from __future__ import annotations

__all__ = ["fitted_what"]


def fitted_what(provenance) -> str:
    """``"direct route, hankel (HankelPredictor)"`` from a model file's provenance; ``"a saved model"`` without it.

    Examples
    --------
    >>> fitted_what({"route": "indirect", "method": "subspace", "estimator": "SubspaceId"})
    'indirect route, subspace (SubspaceId)'
    >>> fitted_what(None)
    'a saved model'
    """
    prov = provenance if isinstance(provenance, dict) else {}
    route, method, estimator = (prov.get(k) for k in ("route", "method", "estimator"))
    if not (route and method):
        return "a saved model"
    return f"{route} route, {method}" + (f" ({estimator})" if estimator else "")
