"""Order selection of subspace identification: held-out error and stability, and an order cap that grows while
it binds.

Rule (stated in :class:`~stimsteer.sysid.subspace.SubspaceId`): the orders whose held-out k-step error is within
``tolerance`` (relative, default 5 %) of the best are acceptable; among them the singular-value-gap order is
preferred, then the smaller orders; the first whose model fitted on all training data is stable (spectral radius
< 1) is chosen. An unstable order is chosen only when no acceptable order is stable, and then with a note and a
warning. Choosing the simplest adequate model by validation follows Ljung (1999), System Identification, 2nd ed.,
ch. 16; preferring a stable model for free-run prediction is common practice (no source).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .projection import _fit_order

__all__ = ["choose_stable", "grow_cap", "order_tables"]


def grow_cap(est, table, proj_fit, S_check, sv, cfg, notes):
    """Raise the default order cap while the held-out error is lowest at it; say so when a cap still binds."""
    possible = min(cfg["supported"], cfg["layout"].max_order)
    while est.max_order is None and cfg["order"] is None and cfg["top"] < possible and \
            int(table["order"].iloc[int(np.argmin(table["heldout_error"].to_numpy()))]) == cfg["top"]:
        start, cfg["top"] = cfg["top"] + 1, min(possible, 2 * cfg["top"])
        table = pd.concat([table, est._order_table(proj_fit, S_check, sv, cfg, start)], ignore_index=True)
    best = int(table["order"].iloc[int(np.argmin(table["heldout_error"].to_numpy()))])
    # a cap at the supported rank does not bind: the singular values beyond it are rounding noise
    if cfg["order"] is None and best == cfg["top"] and len(table) > 1 and cfg["top"] < cfg["supported"]:
        why = (f"max_order={est.max_order}" if est.max_order is not None else
               f"the largest order the windows allow, min(p (f − 1), p i) = {possible}")
        notes.append(f"the held-out error is lowest at the order cap {cfg['top']} ({why}): a larger order might "
                     "predict better; raise max_order or lengthen past_steps/future_steps.")
    return table


def choose_stable(table: pd.DataFrame, gap: int, tolerance: float, proj_all, feedthrough: bool, notes):
    """The order and its matrices (fitted on all training data) chosen by held-out error and stability.

    Orders whose held-out error is within ``tolerance`` (relative) of the best are acceptable; the gap order is
    preferred among them, then the smaller orders. The first acceptable order whose model (fitted on all
    training data) is stable wins. When none is stable, the preferred acceptable order is kept with a note
    (and the unstable-model warning of ``SubspaceId._store``).
    """
    err = table["heldout_error"].to_numpy()
    orders = table["order"].to_numpy()
    ok = err <= err.min() * (1.0 + tolerance) + 1e-12
    prefer = ([gap] if ok[orders == gap].any() else []) + [int(n) for n in orders[ok] if n != gap]
    fits = {}
    for n in prefer:
        fits[n] = _fit_order(proj_all, n, feedthrough)
        if np.max(np.abs(np.linalg.eigvals(fits[n]["A"])), initial=0.0) < 1.0:
            if n != prefer[0]:
                notes.append(f"order {prefer[0]} (preferred by the singular-value gap and held-out error) is "
                             f"unstable; order {n}, stable and within {100 * tolerance:g} % of the best held-out "
                             "error, was chosen instead.")
            return n, fits[n]
    n = prefer[0]
    notes.append(f"no stable order has a held-out error within {100 * tolerance:g} % of the best (orders "
                 f"{[int(o) for o in orders[ok]]}); the unstable order {n} was kept. Its free-run predictions "
                 "grow without bound; try longer past/future windows or check for closed-loop recording.")
    return n, fits[n]


def order_tables(est, proj_fit, S_check, sv, cfg, notes):
    """The order table, with or without a direct term (both for ``feedthrough="auto"``); sets ``feedthrough_``.

    With "auto", the direct term is kept only when it lowers the best held-out error by more than the tolerance
    (a simpler model wins a near tie, as for the order).
    """
    found = {}
    for ft in (False, True) if isinstance(est.feedthrough, str) else (bool(est.feedthrough),):
        est.feedthrough_ = ft
        c, n = dict(cfg), []
        found[ft] = (grow_cap(est, est._order_table(proj_fit, S_check, sv, c, 1), proj_fit, S_check, sv, c, n), c, n)
    best = {ft: float(t["heldout_error"].min()) for ft, (t, _c, _n) in found.items()}
    # the absolute floor keeps exact data (errors at rounding level either way) without a direct term
    est.feedthrough_ = bool(True in best and best[True] < best.get(False, np.inf) * (1.0 - cfg["tolerance"]) - 1e-12)
    table, c, n = found[est.feedthrough_]
    cfg.update(c)
    notes.extend(n)
    return table
