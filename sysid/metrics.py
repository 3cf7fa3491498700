"""Prediction scores per channel and per step ahead, on held-out data, and residual tests.

Normalisations (per output channel, over the scored samples of that channel and step):

* ``RMSE  = sqrt(mean(e²))`` with ``e = y − ŷ``, in the channel's unit;
* ``NRMSE = RMSE / std(y)`` — the population standard deviation (ddof = 0) of the measured values;
* ``R²    = 1 − SSE / SST`` with ``SST = Σ (y − mean(y))²`` (about the mean of the measured values), so
  ``R² = 1 − NRMSE²``;
* ``VAF   = 100 · (1 − var(e) / var(y))`` in percent; it ignores a constant bias in ``e``, R² does not.

Scores are pooled over all prediction windows of the scored session. Windows are built inside valid segments only
(:meth:`Session.segments`): neither the past window nor the predicted span crosses a trial boundary or a masked
sample. Outputs blanked by ``Session.output_mask`` (stimulation artifacts) are predicted but not scored.

One scoring definition, used by ``stimsteer fit`` (its printed held-out scores), ``stimsteer predict
--score-trial`` and ``stimsteer bench``: k-step windows start at every ``stride``-th sample ``t`` of a valid
segment with ``s + P <= t <= e − H``; the free run of a segment ``[s, e)`` is given its first ``P = past_steps_``
measured samples and predicts ``[s + P, e)`` from the inputs alone (chained blocks for a finite horizon).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from numpy.lib.stride_tricks import as_strided, sliding_window_view

from ._windows import apply_checked, apply_stacked, one_blas_thread, stacked_maps, window_predictions
from ._windows import predict_batch as _predict_batch
from .exceptions import SessionError
from .output_mask import output_valid
from .residual_tests import CrossCorrelation, LjungBox, input_residual_xcorr, ljung_box

__all__ = ["r2", "nrmse", "vaf", "Scores", "kstep_scores", "freerun_scores", "LjungBox", "ljung_box",
           "CrossCorrelation", "input_residual_xcorr"]


_METRICS = ("r2", "nrmse", "vaf", "rmse")
_BATCH_WINDOWS = 512
#: Windows scored together by a predictor with linear maps (a product of ~170 × 160 columns: 5 MB per 4096 windows).
_LINEAR_BATCH_WINDOWS = 4096


# ------------------------------------------------------------------------------------------------ plain metrics
def _pair(y_true, y_pred):
    yt = np.asarray(y_true, dtype=np.float64)
    yp = np.asarray(y_pred, dtype=np.float64)
    yt = yt[:, None] if yt.ndim == 1 else yt
    yp = yp[:, None] if yp.ndim == 1 else yp
    if yt.shape != yp.shape or yt.ndim != 2 or yt.shape[0] < 2:
        raise SessionError(
            f"measured and predicted outputs must be 2-D time-major arrays of the same shape with at least 2 "
            f"samples; got {yt.shape} and {yp.shape}."
        )
    if not (np.all(np.isfinite(yt)) and np.all(np.isfinite(yp))):
        raise SessionError("measured or predicted outputs hold NaN or infinite values; score valid samples only.")
    return yt, yp


def _safe_ratio(num, den):
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)


def r2(y_true, y_pred) -> np.ndarray:
    """Coefficient of determination per channel, ``1 − SSE / SST`` about the mean of ``y_true``.

    Parameters
    ----------
    y_true, y_pred : ndarray, shape (n_samples, n_channels)

    Returns
    -------
    ndarray, shape (n_channels,)
        NaN for a channel whose measured values do not vary.
    """
    yt, yp = _pair(y_true, y_pred)
    sse = ((yt - yp) ** 2).sum(axis=0)
    sst = ((yt - yt.mean(axis=0)) ** 2).sum(axis=0)
    return 1.0 - _safe_ratio(sse, sst)


def nrmse(y_true, y_pred) -> np.ndarray:
    """Root-mean-square error divided by the (ddof = 0) standard deviation of ``y_true``, per channel."""
    yt, yp = _pair(y_true, y_pred)
    return _safe_ratio(np.sqrt(((yt - yp) ** 2).mean(axis=0)), yt.std(axis=0))


def vaf(y_true, y_pred) -> np.ndarray:
    """Variance accounted for, ``100 · (1 − var(y_true − y_pred) / var(y_true))`` in percent, per channel."""
    yt, yp = _pair(y_true, y_pred)
    return 100.0 * (1.0 - _safe_ratio((yt - yp).var(axis=0), yt.var(axis=0)))


# ------------------------------------------------------------------------------------------------ accumulation
class _Pooled:
    """Streaming count, mean and centred sum of squares of ``y`` and ``e`` plus ``Σ e²`` (Chan et al. merge)."""

    def __init__(self, shape):
        self.n = np.zeros(shape)
        self.my, self.My = np.zeros(shape), np.zeros(shape)
        self.me, self.Me = np.zeros(shape), np.zeros(shape)
        self.sse = np.zeros(shape)

    def add(self, y, e, valid=None):
        """Add samples stacked on axis 0: ``y, e`` of shape (n_new, *shape); ``valid`` (bool, broadcastable to
        them) keeps only the samples whose outputs are not blanked."""
        if valid is not None and not np.all(valid):
            self._add_weighted(y, e, np.broadcast_to(valid, y.shape))
            return
        nb = y.shape[0]
        if nb == 0:
            return
        n = self.n + nb
        flat = y.shape[0], -1  # sums over axis 0 as one matrix product each (einsum over the leading axis)
        buf = np.empty(np.broadcast_shapes(y.shape, e.shape))  # the deviations of y, then of e: one allocation
        for mean_attr, m2_attr, x in (("my", "My", y), ("me", "Me", e)):
            mb = x.sum(axis=0) / nb
            d = np.subtract(x, mb, out=buf).reshape(flat)
            Mb = np.einsum("ij,ij->j", d, d).reshape(mb.shape)
            ma, Ma = getattr(self, mean_attr), getattr(self, m2_attr)
            delta = mb - ma
            setattr(self, mean_attr, ma + delta * nb / n)
            setattr(self, m2_attr, Ma + Mb + delta ** 2 * self.n * nb / n)
        ef = e.reshape(flat)
        self.sse += np.einsum("ij,ij->j", ef, ef).reshape(self.sse.shape)
        self.n = n

    def _add_weighted(self, y, e, valid):
        # the same merge with per-entry counts: blanked samples count nowhere (their values are bridged, not measured)
        w = valid.astype(np.float64)
        nb = w.sum(axis=0)
        n = self.n + nb
        frac = np.where(n > 0, _safe_ratio(nb, n), 0.0)
        for mean_attr, m2_attr, x in (("my", "My", y), ("me", "Me", e)):
            x = np.where(valid, x, 0.0)
            mb = np.where(nb > 0, _safe_ratio(x.sum(axis=0), nb), 0.0)
            Mb = (w * (x - mb) ** 2).sum(axis=0)
            ma, Ma = getattr(self, mean_attr), getattr(self, m2_attr)
            delta = mb - ma
            setattr(self, mean_attr, ma + delta * frac)
            setattr(self, m2_attr, Ma + Mb + delta ** 2 * self.n * frac)
        self.sse += (np.where(valid, e, 0.0) ** 2).sum(axis=0)
        self.n = n

    def table(self) -> dict:
        rmse = np.sqrt(_safe_ratio(self.sse, self.n))
        return {
            "r2": 1.0 - _safe_ratio(self.sse, self.My),
            "nrmse": _safe_ratio(rmse, np.sqrt(_safe_ratio(self.My, self.n))),
            "vaf": 100.0 * (1.0 - _safe_ratio(self.Me, self.My)),
            "rmse": rmse,
            "n_samples": self.n.astype(np.int64),
        }


# ------------------------------------------------------------------------------------------------ Scores
def _empty_kstep() -> pd.DataFrame:
    return _empty("kstep")


def _empty_freerun() -> pd.DataFrame:
    return _empty("freerun")


_EMPTY: dict = {}


def _empty(kind: str) -> pd.DataFrame:
    """A new empty scores table (``kstep``, or ``freerun`` without ``step``), copied from one built at first use:
    every :class:`Scores` holds one, and building it column by column took 1.4-2.6 ms (0.03 ms copied)."""
    if kind not in _EMPTY:
        kstep = pd.DataFrame({"step": pd.Series(dtype=np.int64), "channel": pd.Series(dtype=object),
                              **{k: pd.Series(dtype=float) for k in _METRICS}, "n_samples": pd.Series(dtype=np.int64)})
        _EMPTY.update(kstep=kstep, freerun=kstep.drop(columns="step"))
    return _EMPTY[kind].copy(deep=True)


@dataclass(frozen=True)
class Scores:
    """Held-out prediction scores.

    Attributes
    ----------
    output_names : tuple of str
    kstep : pandas.DataFrame
        One row per (step ahead, channel): ``step`` (1 … horizon_steps), ``channel``, ``r2``, ``nrmse``, ``vaf``,
        ``rmse``, ``n_samples``. Empty when no k-step scores were computed.
    freerun : pandas.DataFrame
        One row per channel with the same metric columns, for free-run prediction over whole segments. Empty when
        not computed.
    horizon_steps : int
        0 when there are no k-step scores.
    stride_steps : int
        Spacing of consecutive k-step windows in samples.
    n_windows : int
        Number of k-step windows scored.
    n_segments : int
        Number of segments scored in free run.
    freerun_steps : int
        Longest free run scored (samples predicted after the past window of one segment); 0 when unknown (scores
        written before it was recorded).

    Notes
    -----
    See the module docstring for the normalisations. Step ``h`` scores the prediction ``h`` samples after the end of
    the past window (``h = 1`` is the one-step-ahead prediction).
    """

    output_names: tuple
    kstep: pd.DataFrame = field(default_factory=_empty_kstep)
    freerun: pd.DataFrame = field(default_factory=_empty_freerun)
    horizon_steps: int = 0
    stride_steps: int = 1
    n_windows: int = 0
    n_segments: int = 0
    freerun_steps: int = 0

    def metric(self, name: str) -> pd.DataFrame:
        """One k-step metric as a table: index ``step``, one column per output channel."""
        if name not in _METRICS:
            raise SessionError(f"unknown metric {name!r}; choose one of {list(_METRICS)}.")
        if self.kstep.empty:
            return pd.DataFrame(columns=list(self.output_names), dtype=float)
        wide = self.kstep.pivot(index="step", columns="channel", values=name)
        return wide[list(self.output_names)]

    def summary(self) -> pd.DataFrame:
        """Mean over channels of each metric, per step ahead, plus a ``free run`` row (when scored)."""
        rows = []
        if not self.kstep.empty:
            g = self.kstep.groupby("step")[list(_METRICS)].mean()
            rows += [{"prediction": f"{int(h)}-step", **g.loc[h].to_dict()} for h in g.index]
        if not self.freerun.empty:
            rows.append({"prediction": "free run", **self.freerun[list(_METRICS)].mean().to_dict()})
        return pd.DataFrame(rows, columns=["prediction", *_METRICS])

    def error_band(self, n_steps: int) -> np.ndarray:
        """Held-out RMSE per step and channel for a prediction of ``n_steps`` samples, shape (n_steps, p).

        Steps up to ``horizon_steps`` use the k-step RMSE; later steps use the free-run RMSE when scored, else the
        RMSE of the last scored step. Steps beyond the longest scored free run (``freerun_steps``, when known) are
        NaN: no held-out prediction was that long, so there is no evidence of the error there.
        """
        p = len(self.output_names)
        band = np.full((int(n_steps), p), np.nan)
        ks = self.metric("rmse").to_numpy() if not self.kstep.empty else np.zeros((0, p))
        h = min(ks.shape[0], band.shape[0])
        band[:h] = ks[:h]
        if self.freerun.empty:
            tail = ks[-1] if ks.shape[0] else np.full(p, np.nan)
        else:
            tail = self.freerun.set_index("channel").loc[list(self.output_names), "rmse"].to_numpy()
        band[h:] = tail
        if self.freerun_steps and not self.freerun.empty:
            band[max(int(self.freerun_steps), h):] = np.nan
        return band

    def covered_steps(self) -> int | None:
        """Number of steps ahead the held-out band covers (None: unknown, or without limit for old scores)."""
        if self.freerun.empty:
            return int(self.horizon_steps)
        return int(self.freerun_steps) or None

    def merged(self, other: "Scores") -> "Scores":
        """These scores with the non-empty tables of ``other`` (same channels) added."""
        if tuple(other.output_names) != tuple(self.output_names):
            raise SessionError("scores of different output channels cannot be merged.")
        ks = other if not other.kstep.empty else self
        fr = other if not other.freerun.empty else self
        return Scores(self.output_names, ks.kstep, fr.freerun, ks.horizon_steps, ks.stride_steps, ks.n_windows,
                      fr.n_segments, fr.freerun_steps)

    def to_dict(self) -> dict:
        """JSON-like form (lists, numbers, strings); :meth:`from_dict` inverts it."""
        def cols(df):
            return {c: [v.item() if hasattr(v, "item") else v for v in df[c].tolist()] for c in df.columns}

        return {"output_names": list(self.output_names), "kstep": cols(self.kstep), "freerun": cols(self.freerun),
                "horizon_steps": int(self.horizon_steps), "stride_steps": int(self.stride_steps),
                "n_windows": int(self.n_windows), "n_segments": int(self.n_segments),
                "freerun_steps": int(self.freerun_steps)}

    @classmethod
    def from_dict(cls, d: dict) -> "Scores":
        ks, fr = _empty_kstep(), _empty_freerun()
        kstep = pd.DataFrame(d["kstep"], columns=ks.columns).astype(ks.dtypes.to_dict()) \
            if d["kstep"].get("channel") else ks
        freerun = pd.DataFrame(d["freerun"], columns=fr.columns).astype(fr.dtypes.to_dict()) \
            if d["freerun"].get("channel") else fr
        return cls(tuple(d["output_names"]), kstep, freerun, int(d["horizon_steps"]), int(d["stride_steps"]),
                   int(d["n_windows"]), int(d["n_segments"]), int(d.get("freerun_steps", 0)))

    def to_text(self, max_steps: int = 6) -> str:
        """A short plain-text table of :meth:`summary`: at most ``max_steps`` k-step rows (first, last and evenly
        spaced ones between; the full table is :meth:`summary`), then the free run."""
        s = self.summary()
        if s.empty:
            return "(no scores)"
        kstep = np.flatnonzero(s.iloc[:, 0].astype(str).str.endswith("-step").to_numpy())
        if kstep.size > max(int(max_steps), 2):
            keep = set(kstep[np.unique(np.round(np.linspace(0, kstep.size - 1, int(max_steps))).astype(int))])
            s = s.iloc[[i for i in range(len(s)) if i not in set(kstep) or i in keep]]
        return s.to_string(index=False, float_format=lambda v: f"{v:.4g}")


# ------------------------------------------------------------------------------------------------ held-out scoring
def _window_lengths(predictor, horizon_steps):
    past = getattr(predictor, "past_steps_", None)
    if past is None:
        past = getattr(predictor, "past_steps", None)
    if past is None or not hasattr(predictor, "predict"):
        raise SessionError(
            f"expected a fitted predictor with predict(u_past, y_past, u_future) and past_steps_; got "
            f"{type(predictor).__name__}. Fit it first."
        )
    limit = getattr(predictor, "max_horizon_steps_", None)
    if horizon_steps is not None:
        H = int(horizon_steps)
        if H < 1 or H != horizon_steps:
            raise SessionError(f"horizon_steps must be a whole number >= 1; got {horizon_steps!r}.")
        if limit is not None and H > int(limit):
            raise SessionError(
                f"this predictor predicts at most {int(limit)} steps ahead; got horizon_steps={H}. Ask for "
                f"{int(limit)} or fewer, or refit it with a longer horizon."
            )
        return int(past), H, limit
    return int(past), None, limit


def _output_names(session) -> tuple:
    names = getattr(session, "output_names", None)
    return tuple(names) if names else tuple(f"y{i}" for i in range(int(session.n_outputs)))


def _long_table(names, tab, steps=None) -> pd.DataFrame:
    p = len(names)
    channel = np.tile(np.asarray(names, dtype=object), 1 if steps is None else len(steps))
    rows = {"channel": pd.Series(channel, dtype=object)}  # one dtype whatever pandas would infer for strings
    if steps is not None:
        rows = {"step": np.repeat(np.asarray(steps, dtype=np.int64), p), **rows}
    for k in (*_METRICS, "n_samples"):
        rows[k] = np.asarray(tab[k]).reshape(-1)
    return pd.DataFrame(rows)


def kstep_scores(predictor, session, *, horizon_steps: int, stride_steps: int = 1) -> Scores:
    """Scores of predictions 1 … ``horizon_steps`` samples ahead from every past window of a (held-out) session.

    Parameters
    ----------
    predictor : fitted predictor
        Anything with ``predict(u_past, y_past, u_future)`` and ``past_steps_`` (or a :class:`StateSpaceModel`).
    session : Session or SessionFile
        Scored data, normally the held-out trials only.
    horizon_steps : int
        Number of steps ahead, ``H >= 1`` (at most the predictor's ``max_horizon_steps_``).
    stride_steps : int, default 1
        Spacing of consecutive windows in samples (1 = every window).

    Returns
    -------
    Scores
        With the ``kstep`` table filled (step 1 … H, every channel).

    Raises
    ------
    SessionError
        Bad arguments, or no segment holds ``past_steps + H`` valid samples.

    Notes
    -----
    A window starting at sample ``t`` of a valid segment ``[s, e)`` uses the past ``[t − P, t)`` and is scored on
    ``[t, t + H)``, with ``s + P <= t <= e − H``: nothing crosses a trial boundary or a masked sample.
    """
    P, H, _ = _window_lengths(predictor, horizon_steps)
    stride = int(stride_steps)
    if stride < 1 or stride != stride_steps:
        raise SessionError(f"stride_steps must be a whole number >= 1; got {stride_steps!r}.")
    names = _output_names(session)
    p = len(names)
    pooled, n_windows = _Pooled((H * p,)), 0  # step-major: entry h·p + j is step h + 1 of channel j
    linear = stacked_maps(predictor, P, H, int(session.n_inputs), p)
    batch = (_LINEAR_BATCH_WINDOWS if linear is not None else _BATCH_WINDOWS) * stride
    with one_blas_thread():
        for s, e in session.segments(min_length=P + H):
            u, y, _mask = session.read(s, e)
            u, y = np.ascontiguousarray(u, dtype=np.float64), np.ascontiguousarray(y, dtype=np.float64)
            scored = output_valid(session, s, e)  # blanked outputs are not scored (Session.output_mask)
            ok_win = None if scored.all() else sliding_window_view(scored, P + H)[:, P:, None]
            # the measured futures y[t, t + H) of the windows as rows of one strided view of the run (no copy)
            n_win = e - s - H - P + 1
            y_fut = as_strided(y.reshape(-1)[P * p:], shape=(n_win, H * p), strides=(p * 8, 8), writeable=False)
            for i in range(0, n_win, batch):
                rows = slice(i, min(n_win, i + batch), stride)
                yf, yhat = y_fut[rows], window_predictions(predictor, linear, u, y, P, H, rows)
                ok = None if ok_win is None else np.broadcast_to(ok_win[rows], (yf.shape[0], H, p)).reshape(yf.shape)
                pooled.add(yf, np.subtract(yf, yhat, out=yhat), ok)
                n_windows += yf.shape[0]
    if n_windows == 0:
        raise SessionError(
            f"no valid segment of the session holds past_steps + horizon_steps = {P + H} samples, so nothing can be "
            "scored. Use a shorter horizon, or score on longer trials."
        )
    table = _long_table(names, pooled.table(), steps=np.arange(1, H + 1))
    return Scores(names, kstep=table, horizon_steps=H, stride_steps=stride, n_windows=n_windows)


def _free_run(predictor, u, y, P, limit):
    """Prediction of ``y[P:]`` from the measured ``[0, P)`` only; chained in blocks when the horizon is limited."""
    return _free_runs(predictor, u[None], y[None], P, limit)[0]


def _free_runs(predictor, u, y, P, limit):
    """:func:`_free_run` of a batch of runs of equal length, ``u`` (n, T, m) and ``y`` (n, T, p): each block of
    every run in one ``predict_many`` call, or one product with the block's prediction maps where the predictor has
    them (the runs are independent; a run's numbers do not depend on the others)."""
    n, T = u.shape[:2]
    step = T - P if limit is None else int(limit)
    y_run = np.empty((n, T, y.shape[2]))  # the measured start, then the predictions, written in place
    y_run[:, :P] = y[:, :P]
    maps = {}  # a predictor with linear maps and a limited horizon: each block one product with the block's maps
    # finite inputs and start checked once: each block then checks only its fed-back outputs (apply_checked)
    checked = P >= 1 and bool(np.all(np.isfinite(u)) and np.all(np.isfinite(y[:, :P])))
    with one_blas_thread():
        for t in range(P, T, step):
            stop = min(T, t + step)
            if limit is not None and stop - t not in maps:
                maps[stop - t] = stacked_maps(predictor, P, stop - t, u.shape[2], y.shape[2])
            past, future = (u[:, t - P: t], y_run[:, t - P: t]), u[:, t: stop]
            if maps.get(stop - t) is None:
                y_run[:, t:stop] = _predict_batch(predictor, *past, future)
            elif checked:
                y_run[:, t:stop] = apply_checked(maps[stop - t], *past, future)
            else:
                y_run[:, t:stop] = apply_stacked(maps[stop - t], *past, future)
    return y_run[:, P:]



#: Samples (runs x length) of the free runs predicted in one batch: segments of equal length, in their order.
_FREERUN_BATCH_SAMPLES = 1 << 18


def freerun_scores(predictor, session, *, max_steps: int | None = None) -> Scores:
    """Scores of free-run prediction: from the first past window of each valid segment over the rest of it.

    Parameters
    ----------
    predictor : fitted predictor
    session : Session or SessionFile
    max_steps : int, optional
        Score at most this many samples after each past window (default: the whole segment).

    Returns
    -------
    Scores
        With the ``freerun`` table filled (one row per channel, pooled over segments).

    Notes
    -----
    Only the first ``past_steps`` measured samples of a segment are given; afterwards the predictor feeds back its
    own predictions. Predictors with a finite ``max_horizon_steps_`` are chained block by block, each block's past
    outputs taken from the previous predictions.
    """
    P, _, limit = _window_lengths(predictor, None)
    if max_steps is not None and (int(max_steps) < 1 or int(max_steps) != max_steps):
        raise SessionError(f"max_steps must be a whole number >= 1 or None; got {max_steps!r}.")
    names = _output_names(session)
    pooled, n_seg, longest = _Pooled((len(names),)), 0, 0
    for batch in _equal_runs(session, P, max_steps):
        reads = [session.read(s, stop) for s, stop in batch]
        u, y = np.stack([r[0] for r in reads]), np.stack([r[1] for r in reads])
        yhat = _free_runs(predictor, u, y, P, limit)
        for k, (s, stop) in enumerate(batch):  # pooled segment by segment, in the session's order
            pooled.add(y[k, P:], y[k, P:] - yhat[k], output_valid(session, s + P, stop)[:, None])
            n_seg += 1
            longest = max(longest, stop - s - P)
    if n_seg == 0:
        raise SessionError(
            f"no valid segment of the session is longer than past_steps + 1 = {P + 1} samples; nothing can be "
            "scored in free run. Score on longer trials."
        )
    return Scores(names, freerun=_long_table(names, pooled.table()), n_segments=n_seg, freerun_steps=longest)


def _equal_runs(session, P, max_steps):
    """The free runs ``(start, stop)`` of the valid segments, in order, as consecutive batches of equal length (at
    most :data:`_FREERUN_BATCH_SAMPLES` samples each, at least one run)."""
    batch: list = []
    for s, e in session.segments(min_length=P + 2):
        stop = e if max_steps is None else min(e, s + P + int(max_steps))
        if batch and (stop - s != batch[0][1] - batch[0][0]
                      or (len(batch) + 1) * (stop - s) > _FREERUN_BATCH_SAMPLES):
            yield batch
            batch = []
        batch.append((s, stop))
    if batch:
        yield batch
