"""From the session to the projections of subspace identification: one data pass (lag sums of the fitting and the
held-out columns), the scaled Grams, and the projections on all training data and on the fitting part.

Two routes give the same projections (to rounding): Grams of ``_FACTOR_FROM`` rows or more whose estimated condition
number is below ``_CHOLESKY_CONDITION`` take the factor route (:mod:`.factor`: one Cholesky factor per Gram, Grams
assembled one at a time from the lag sums in the factor order and freed once factored, so at most one Gram-sized
array and the held-out Gram are held); smaller or ill-conditioned ones the covariance route
(:class:`~.projection._Projection`, with the Grams in time-major order): its models (from all training data) are
computed exactly as before, bit for bit; its candidate orders on the fitting part, which only score, take the
faster computations of the same equations (nested orders, structured sums, doubling Riccati solver).
"""

from __future__ import annotations

import contextlib
import threading
from concurrent.futures import Future, ThreadPoolExecutor

import numpy as np

from .._lagged import blas_threads
from ..exceptions import ExcitationError, SessionError
from ..output_mask import blanking_note
from .._pages import release_tail, touched
from .factor import factor_projection
from .gram import _Layout, _gram_diagonal, _gram_from_sums, _hankel_sums, _partition
from .heldout import _CheckCov
from .projection import _CHOLESKY_FROM, _Projection, _RTOL, _cond_text

#: Gram rows from which the factor route is tried (below it, the covariance route of before, bit for bit).
_FACTOR_FROM = _CHOLESKY_FROM


def projections(session, cfg: dict, weighting: str, stack=None):
    """``(proj_all, proj_fit, check, scale, how, n_columns)`` of ``session`` for the settings ``cfg``.

    ``check`` holds the held-out covariance blocks (:class:`~.heldout._CheckCov`); ``scale`` the channels' RMS
    (``[u y]``); ``how`` says how the held-out part was chosen. Given ``stack`` (a :class:`contextlib.ExitStack`),
    the factor route may return while ``proj_all``'s SVD still runs on its thread (``proj_all.pending``, a future:
    wait for it before reading its results); BLAS then stays on one thread, and the thread is joined, until the
    caller's stack closes.
    """
    L = cfg["layout"]
    segs = session.segments(min_length=L.width)
    if not segs:
        longest = max((b - a for a, b in session.segments()), default=0)
        raise SessionError(
            f"past_steps + future_steps = {L.width} samples is longer than every valid segment (the longest "
            f"run of valid in-trial samples has {longest}). Use shorter past/future windows or longer trials."
        )
    fit, check, how = _partition(session, L.width, cfg["fraction"], cfg["seed"])
    acc_fit, acc_check = _hankel_sums(session, [fit, check], L)
    n_fit, n_check = int(acc_fit.n), int(acc_check.n)
    for label, n_cols in (("the fitting part", n_fit), ("all training data", n_fit + n_check)):
        if n_cols < L.nz:
            raise SessionError(
                f"{label} gives {n_cols} Hankel columns for {L.nz} rows ((m + p)(past_steps + future_steps)); "
                "at least as many columns as rows are needed (many more for noisy data). Record longer trials "
                "or use shorter past/future windows." + blanking_note(session, segs, L.width, L.i)
            )
    if n_check == 0:
        raise SessionError(
            f"no held-out part with {L.width} samples could be set aside for the order check ({how}). "
            "Record more or longer trials, or use shorter past/future windows."
        )
    with contextlib.ExitStack() as own:
        keep = own if stack is None else stack
        keep.enter_context(blas_threads(1))  # Gram-sized factorisations: one thread is faster on a busy machine
        out = _factor_route(acc_fit, acc_check, L, session, weighting, keep, cfg.get("ahead")) \
            if L.nz >= _FACTOR_FROM else None
        if out is None:
            out = _covariance_route(acc_fit, acc_check, L, session, weighting)
    return (*out, how, n_fit + n_check)


def _covariance_route(acc_fit, acc_check, L: _Layout, session, weighting: str):
    """The route of before: three time-major Grams and :class:`_Projection` (covariances inverted block by block)."""
    G_fit, G_check = _gram_from_sums(acc_fit, L), _gram_from_sums(acc_check, L)
    n_fit, n_check = int(acc_fit.n), int(acc_check.n)
    G_all = G_fit + G_check
    scale = channel_scales(np.diagonal(G_all), n_fit + n_check, L, session)
    full = np.tile(scale, L.width)
    S_all, S_fit, S_check = (scaled(G, N, full) for G, N in ((G_all, n_fit + n_check), (G_fit, n_fit),
                                                             (G_check, n_check)))
    for S in (S_all, S_fit):
        check_excitation(S[np.ix_(L.Uf, L.Uf)], L)
    # the models handed out come from all data, bit for bit as before; the fitting part's orders only score
    return (_Projection(S_all, L, weighting, exact=True), _Projection(S_fit, L, weighting),
            _CheckCov.time_major(S_check, L), scale)


def _factor_route(acc_fit, acc_check, L: _Layout, session, weighting: str, stack, ahead=None):
    """The projections from one Cholesky factor per Gram (:mod:`.factor`); None when a Gram is too ill conditioned.
    ``ahead(proj_fit, check)``: called on the fitting part's thread once its projection and the held-out blocks are
    ready, its result kept as ``proj_fit.ahead`` (the order scores taken ahead: ``SubspaceId._ahead``).

    Two pipelines run side by side, one per core (BLAS on one thread each): the fitting part's on a thread of its
    own (:func:`_fit_pipeline`: factor, projection, decomposition) once its Gram is assembled here, all data's on
    this one (:func:`_assembled`, :func:`_projection`), whose SVD (:meth:`~.factor._FactorProjection.decompose`) is
    then left running on a second thread (``proj_all.pending``; ``stack`` joins it when it closes) so that the
    fitting part's candidate orders can be scored meanwhile. Each pipeline keeps one Gram-sized buffer: the Gram is
    assembled in it in the factor order and overwritten by its factor (whose ``n``-independent pieces the projection
    copies); all data's then serves as its SVD's workspace, the fitting part's (whose decomposition only scores and
    computes in memory of its own: ``scoring``) for the held-out Gram's rows of the past and of the future inputs
    (:class:`~.heldout._CheckCov` needs no more), assembled by whichever thread is free first (:class:`_HeldOut`).
    The Cholesky factorisations and the decompositions release the GIL. The same computations as one after the other,
    so the same numbers; when both fail, the fitting part's failure is the one reported (it was checked first
    before). (When only the fitting part's Gram is too ill conditioned, all data's SVD has started and is joined in
    vain: the covariance route follows.)
    """
    order = L.factor_order()
    acc_all = acc_fit.plus(acc_check)
    scale = channel_scales(_gram_diagonal(acc_all, L), int(acc_all.n), L, session)
    full = np.tile(scale, L.width)[order]
    fit_side = ThreadPoolExecutor(max_workers=1, thread_name_prefix="stimsteer-subspace-fit")
    svd_side = ThreadPoolExecutor(max_workers=1, thread_name_prefix="stimsteer-subspace-svd-all")
    stack.callback(svd_side.shutdown)  # (leaving waits for a decomposition already started)
    stack.callback(fit_side.shutdown)
    # the fitting part's Gram assembled first (here), then all data's beside its Cholesky: never two assemblies at
    # once (their Python-driven copies take turns on the GIL: no faster than one after the other, and more CPU).
    # All data's buffer is paged in meanwhile on the fitting part's thread, idle until then: measured (fresh
    # process, the 3,450-row Gram of the benchmark session, 4 runs each), the second Gram assembled into a new
    # buffer took 0.24-0.85 s of CPU, into a buffer paged in beforehand 0.21-0.33 s plus 0.01-0.09 s of paging
    # (the assembly's strided writes take the page faults one by one; a sequential pass takes them in order)
    paged, held = fit_side.submit(touched, L.nz * L.nz), _HeldOut(acc_check, L, order, full, scale)
    fit_job = fit_side.submit(_fit_pipeline, _assembled(acc_fit, L, order, full), L, weighting, held, ahead)
    try:
        proj_all, buffer = _projection(_assembled(acc_all, L, order, full, paged.result()), L, weighting)
    except BaseException:
        if fit_job.result() is None:  # (re-raises what the fitting part's pipeline raised)
            return None
        raise
    if proj_all is not None:  # (its pages beyond the SVD's workspace handed back: the peak memory is at its end)
        proj_all.pending = svd_side.submit(proj_all.decompose, buffer, 0)
    del buffer
    held.take()  # (unless the fitting part's thread, done first, has taken them)
    check = held.blocks.result()
    proj_fit = fit_job.result()
    if proj_fit is None or proj_all is None:
        return None
    return proj_all, proj_fit, check, scale


def _assembled(acc, L: _Layout, order, full, buffer: np.ndarray | None = None):
    """``(G, buffer)``: the scaled Gram of ``acc`` in the factor order, assembled in ``buffer`` (flat, at least
    Gram-sized; by default a new one)."""
    buffer = np.empty(L.nz * L.nz) if buffer is None else buffer
    return scaled(_gram_from_sums(acc, L, order, out=buffer), int(acc.n), full), buffer


def _projection(assembled, L: _Layout, weighting: str):
    """``(projection or None, buffer)`` of an :func:`_assembled` Gram: its inputs' excitation checked, then its
    :func:`~.factor.factor_projection` (the factor overwrites the Gram)."""
    G, buffer = assembled
    check_excitation(G[:L.m * L.f, :L.m * L.f], L)
    return factor_projection(G, L, weighting), buffer


def _fit_pipeline(assembled, L: _Layout, weighting: str, held: "_HeldOut", ahead=None):
    """The fitting part's projection of its :func:`_assembled` Gram, decomposed (its orders only score:
    ``scoring``); None when the fitting part's Gram is too ill conditioned. Once the projection has taken the
    factor's pieces, its buffer (the pages beyond the held-out rows handed back) goes to ``held`` (None when there
    is no projection), and the decomposition computes in memory of its own; then the held-out rows are taken
    (:meth:`_HeldOut.take`) unless the main thread has taken them, and ``ahead`` is called (see
    :func:`_factor_route`)."""
    proj = buffer = None
    try:
        proj, buffer = _projection(assembled, L, weighting)
        del assembled
        if proj is not None:
            release_tail(buffer, (L.m * L.f + len(L.P)) * L.nz)
    finally:
        if not held.buffer.done():  # (None when the projection failed or raised: nothing waits in vain)
            held.buffer.set_result(None if proj is None else buffer)
    if proj is None:
        return None
    del buffer
    proj.decompose(None, None, True)
    held.take()
    if ahead is not None:
        proj.ahead = ahead(proj, held.blocks.result())
    return proj


class _HeldOut:
    """The held-out covariance blocks (:class:`~.heldout._CheckCov`, the future ``blocks``; None without a buffer),
    assembled in the fitting part's buffer (the future ``buffer``) by whichever thread is free first: the fitting
    part's once its decomposition is done, or the main thread once all data's decomposition has started (both call
    :meth:`take`; the first one assembles, the other returns at once)."""

    def __init__(self, acc_check, L: _Layout, order, full, scale):
        self._args = (acc_check, L, order, full, scale)
        self.buffer, self.blocks = Future(), Future()
        self._taken, self._lock = False, threading.Lock()

    def take(self) -> None:
        with self._lock:
            if self._taken:
                return
            self._taken = True
        try:
            buffer = self.buffer.result()
            self.blocks.set_result(None if buffer is None else _held_out(*self._args, buffer))
        except BaseException as exc:  # (raised where the blocks are read)
            self.blocks.set_exception(exc)


def _held_out(acc_check, L: _Layout, order, full, scale, buffer) -> _CheckCov:
    """The held-out covariance blocks: the held-out Gram's rows of the future inputs and of the past
    (:class:`~.heldout._CheckCov` needs no more), assembled in ``buffer``, and the diagonal of its future outputs."""
    n, b, e = int(acc_check.n), L.m * L.f, L.m * L.f + len(L.P)
    rows = scaled(_gram_from_sums(acc_check, L, order, (0, e), buffer), n, full, full[:e])  # [Uf; P] rows
    release_tail(buffer, rows.size)  # (held as long as the held-out blocks: only their rows stay resident)
    diag = _gram_diagonal(acc_check, L)[L.Yf] / (n * np.tile(scale, L.width)[L.Yf] ** 2)
    return _CheckCov.factor_rows(rows[b:e], rows[:b], diag, L)


def channel_scales(diag: np.ndarray, N: int, L: _Layout, session) -> np.ndarray:
    """RMS of each channel (``[u y]``) from the diagonal of a time-major Hankel Gram of ``N`` columns; a channel that
    is zero on every valid sample is refused."""
    power = diag.reshape(L.width, L.c).mean(axis=0) / N
    rms = np.sqrt(power)
    names = list(getattr(session, "input_names", [])) + list(getattr(session, "output_names", []))
    for ch in np.flatnonzero(rms <= 0):
        label = names[ch] if ch < len(names) else f"channel {ch}"
        kind = "input" if ch < L.m else "output"
        err = ExcitationError if kind == "input" else SessionError
        raise err(f"{kind} {label!r} is zero on every valid sample; it carries no information. Drop it.")
    return rms


#: Bytes of the band of rows :func:`scaled` divides at a time (two divisions while the band is in cache).
_BAND_BYTES = 1 << 20


def scaled(G: np.ndarray, N: int, s: np.ndarray, s_rows: np.ndarray | None = None) -> np.ndarray:
    """``G / N`` with row ``k`` divided by ``s_rows[k]`` and column ``k`` by ``s[k]`` (``s_rows = s`` by default;
    every channel at unit RMS), in place (the Grams are not used unscaled again)."""
    s_rows = s if s_rows is None else s_rows
    band = max(1, _BAND_BYTES // (8 * max(1, G.shape[1])))
    for a in range(0, G.shape[0], band):  # G / N / outer(s, s) a band of rows at a time: one pass over memory
        rows = G[a:a + band]
        rows /= N
        rows /= np.outer(s_rows[a:a + band], s)
    return G


def check_excitation(S_uu: np.ndarray, L: _Layout) -> None:
    """Refuse future inputs whose (scaled) covariance ``S_uu`` is singular to the cut-off ``_RTOL``."""
    lam = np.linalg.eigvalsh(S_uu)
    if lam[0] <= _RTOL * lam[-1]:
        raise ExcitationError(
            f"the inputs are not persistently exciting over future_steps={L.f} samples (the future-input "
            f"covariance has condition {_cond_text(lam)}); an input that is "
            "constant or too smooth cannot separate the dynamics. Use a richer stimulation schedule "
            "(`stimsteer schedule`)."
        )
