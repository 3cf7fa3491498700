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

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pandas as pd

from .heldout import _CheckCov, batches, heldout_errors, heldout_parts
from .projection import _fit_order, _fit_orders

__all__ = ["choose_stable", "order_tables", "score_orders"]


def score_orders(proj, check, layout, orders, feedthroughs: tuple, workers: int = 1) -> dict:
    """``{setting: [(held-out error, stable), …]}`` of the candidate ``orders`` fitted on ``proj``, for each direct-term
    setting in ``feedthroughs`` (both settings of an order share its equations: :func:`~.projection._fit_orders`).

    The candidates are fitted first; their held-out errors then read the large blocks of ``check`` a batch of
    candidates at a time (:func:`~.heldout.heldout_errors`). With ``workers >= 2`` the orders and the batches are
    computed on that many threads (BLAS on one thread each; matrix products and SciPy's LAPACK calls release the
    GIL): each is computed as on one thread, so the numbers do not depend on ``workers``.
    """
    if isinstance(check, np.ndarray):
        check = _CheckCov.time_major(check, layout)  # once, not once per candidate

    def one(n):
        fits = _fit_orders(proj, n, feedthroughs)
        stable = bool(np.max(np.abs(np.linalg.eigvals(fits[feedthroughs[0]]["A"]))) < 1.0)  # A: the same for both
        return [(heldout_parts(fits[ft], check, layout), stable) for ft in feedthroughs]

    def errors(batch):
        return heldout_errors(batch, check)

    orders = list(orders)
    if orders:  # the nested orders' shared QR sized for all of them first: the same for every order whichever
        proj.nested(max(orders))  # thread asks first (its blocking, and so its rounding, follows its width)
    if workers < 2 or len(orders) < 2:
        fitted = [one(n) for n in orders]
        groups = batches([part for row in fitted for part, _s in row])
        scores = [e for group in groups for e in errors(group)]
    else:
        # the projection's cached pieces are made by the first order, before the threads start (once: a later
        # round of a growing cap finds them); the largest orders are started first, so no thread ends far behind
        first = [one(orders[0])] if getattr(proj, "_order_free", None) is None else []
        with ThreadPoolExecutor(max_workers=workers, thread_name_prefix="stimsteer-subspace") as pool:
            rest = orders[len(first):]
            started = {n: pool.submit(one, n) for n in sorted(rest, reverse=True)}
            fitted = [*first, *(started[n].result() for n in rest)]
            groups = batches([part for row in fitted for part, _s in row])
            scores = [e for got in pool.map(errors, groups) for e in got]
    k = len(feedthroughs)
    return {ft: [(scores[r * k + j], row[j][1]) for r, row in enumerate(fitted)] for j, ft in enumerate(feedthroughs)}


def _rows(orders, scored, sv) -> pd.DataFrame:
    floor = np.finfo(float).eps * max(float(sv[0]), np.finfo(float).tiny)
    return pd.DataFrame([{"order": n, "singular_value": float(sv[n - 1]),
                          "gap_ratio": float(sv[n - 1] / max(sv[n], floor)), "heldout_error": err, "stable": stable}
                         for n, (err, stable) in zip(orders, scored)])


def _grows(est, table, cfg) -> bool:
    """Raise the default order cap (in ``cfg``) while the held-out error is lowest at it; True when it grew."""
    possible = min(cfg["supported"], cfg["layout"].max_order)
    if est.max_order is None and cfg["order"] is None and cfg["top"] < possible and \
            int(table["order"].iloc[int(np.argmin(table["heldout_error"].to_numpy()))]) == cfg["top"]:
        cfg["start"], cfg["top"] = cfg["top"] + 1, min(possible, 2 * cfg["top"])
        return True
    return False


def _cap_note(est, table, cfg, notes) -> None:
    """Say so when the order cap still binds."""
    possible = min(cfg["supported"], cfg["layout"].max_order)
    best = int(table["order"].iloc[int(np.argmin(table["heldout_error"].to_numpy()))])
    # a cap at the supported rank does not bind: the singular values beyond it are rounding noise
    if cfg["order"] is None and best == cfg["top"] and len(table) > 1 and cfg["top"] < cfg["supported"]:
        why = (f"max_order={est.max_order}" if est.max_order is not None else
               f"the largest order the windows allow, min(p (f − 1), p i) = {possible}")
        notes.append(f"the held-out error is lowest at the order cap {cfg['top']} ({why}): a larger order might "
                     "predict better; raise max_order or lengthen past_steps/future_steps.")


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


def _settings(est) -> tuple:
    return (False, True) if isinstance(est.feedthrough, str) else (bool(est.feedthrough),)


def order_tables(est, proj_fit, check, sv, cfg, notes, memo: dict | None = None):
    """The order table, with or without a direct term (both for ``feedthrough="auto"``); sets ``feedthrough_``.

    Each setting's default cap grows on its own; the orders both settings need are fitted together. With "auto",
    the direct term is kept only when it lowers the best held-out error by more than the tolerance (a simpler model
    wins a near tie, as for the order). ``memo``: the scores of each round, ``{(first order, last order,
    settings): scores}``, filled here and read when a round is found in it (e.g. the rounds of a call ahead, while
    the SVD of all data still ran, whose cap and supported rank turned out the same: the same rounds, so the same
    numbers; ``sv`` only fills the table's singular-value columns).
    """
    settings = _settings(est)
    cfgs = {ft: {**cfg, "start": 1} for ft in settings}
    tables = {ft: [] for ft in settings}
    pending = set(settings)
    while pending:
        groups = {}
        for ft in sorted(pending):
            groups.setdefault((cfgs[ft]["start"], cfgs[ft]["top"]), []).append(ft)
        for (a, b), group in groups.items():
            scored = None if memo is None else memo.get((a, b, tuple(group)))
            if scored is None:
                scored = score_orders(proj_fit, check, cfg["layout"], range(a, b + 1), tuple(group),
                                      cfg.get("workers", 1))
                if memo is not None:
                    memo[(a, b, tuple(group))] = scored
            for ft in group:
                tables[ft].append(_rows(range(a, b + 1), scored[ft], sv))
        pending = {ft for ft in settings if _grows(est, pd.concat(tables[ft], ignore_index=True), cfgs[ft])}
    found = {}
    for ft in settings:
        table, c, n = pd.concat(tables[ft], ignore_index=True), cfgs[ft], []
        _cap_note(est, table, c, n)
        c.pop("start")
        found[ft] = (table, c, n)
    best = {ft: float(t["heldout_error"].min()) for ft, (t, _c, _n) in found.items()}
    # the absolute floor keeps exact data (errors at rounding level either way) without a direct term
    est.feedthrough_ = bool(True in best and best[True] < best.get(False, np.inf) * (1.0 - cfg["tolerance"]) - 1e-12)
    table, c, n = found[est.feedthrough_]
    cfg.update(c)
    notes.extend(n)
    return table
