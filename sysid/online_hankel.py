"""The regularised Hankel predictor (DeePC's data) kept up to date as trials arrive: :class:`OnlineHankelPredictor`.

Its data are the row-space factor of the Hankel matrix that :class:`~stimsteer.sysid.online.OnlineLsqPredictor`
updates by block QR (``hankel_factor()``: ``F Fᵀ = H Hᵀ``). From it, and the running channel scales, it builds the
blocks, regulariser and strengths that :meth:`HankelPredictor.data_blocks` gives after a batch fit with one
strength (``lambdas_g=(λ,)``, no cross-validation) on the same trials: the blocks are the same up to a rotation of
their columns, which DeePC with the ``"l2"`` or ``"projection"`` regulariser does not see (``‖Z g‖ = ‖g‖``; the
projector onto the row space of ``[Up; Yp; Uf]`` rotates with them). So a DeePC controller rebuilt on these
blocks after each trial plans as one rebuilt from scratch on all the trials so far.

It offers the data-blocks capability (:class:`~stimsteer.sysid.protocols.DataBlocksForm`) and ``predict``, which
is what the data predictive controller needs; fitted attributes follow the predictor contract.
"""

from __future__ import annotations

import numpy as np

from .datadriven.base import _data_scale
from .datadriven.hankel_predictor import HankelBlocks, _kkt_map, _projection_complement
from .exceptions import InvalidParameterError, NotFittedError, SessionError
from .online import OnlineLsqPredictor, _SessionUpdates, _strength
from .protocols import DataBlocks

__all__ = ["OnlineHankelPredictor"]


class OnlineHankelPredictor(_SessionUpdates):
    """DeePC's data (the compressed Hankel matrix) updated by block QR as trials arrive.

    Parameters
    ----------
    past_steps, horizon_steps : int
        ``Tini`` and ``N`` as in :class:`~stimsteer.sysid.datadriven.HankelPredictor`.
    lambda_g : float
        The relative regulariser strength (one of ``HankelPredictor``'s ``lambdas_g``); the absolute one is
        ``lambda_g · ‖H̃‖²_F / rows`` of the unit-RMS data, recomputed at each update as the batch fit does.
    regularizer : {"projection", "l2"}
    lambda_y : float
        Past-output slack weight on unit-RMS outputs (``HankelPredictor.lambda_y``).
    input_names, output_names : sequence of str, optional
        Default ``u0..``, ``y0..``.

    Attributes
    ----------
    past_steps_, max_horizon_steps_, n_inputs_, n_outputs_, input_names_, output_names_, input_units_,
    output_units_ : as the batch predictor's (after the first update)
    n_columns_ : int
        Hankel windows so far.
    has_linear_maps : False (DeePC plans on the blocks)

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> online = OnlineHankelPredictor(past_steps=2, horizon_steps=3, lambda_g=1e-3)
    >>> u = rng.normal(size=(60, 1))
    >>> _ = online.update(u, np.convolve(u[:, 0], [0.0, 1.0, 0.5])[:60, None])
    >>> online.data_blocks().Yf.shape
    (3, 10)
    """

    has_linear_maps = False

    def __init__(self, *, past_steps, horizon_steps, lambda_g, regularizer="projection", lambda_y=1e3,
                 input_names=None, output_names=None):
        if regularizer not in ("projection", "l2"):
            raise InvalidParameterError(f"regularizer must be 'projection' or 'l2' (the quadratic ones, which the "
                                        f"compressed data reproduce exactly); got {regularizer!r}.")
        self.regularizer = regularizer
        self.lambda_g = _strength("lambda_g", lambda_g)
        self.lambda_y = _strength("lambda_y", lambda_y)
        if not self.lambda_y > 0:
            raise InvalidParameterError(f"lambda_y must be > 0; got {lambda_y!r}.")
        self._factor = OnlineLsqPredictor(past_steps=past_steps, horizon_steps=horizon_steps, alpha=0.0)
        self._names = (input_names, output_names)
        self._blocks = None

    def update(self, u, y, *, new_trial=True):
        """Take new samples in (a whole trial, or the next samples of the current one with ``new_trial=False``).

        Returns
        -------
        self
        """
        self._factor.update(u, y, new_trial=new_trial)
        m, p = self._factor._runs.m, self._factor._runs.p
        names_in, names_out = self._names
        self.n_inputs_, self.n_outputs_ = m, p
        self.past_steps_, self.max_horizon_steps_ = self._factor.past_steps, self._factor.horizon_steps
        self.input_names_ = tuple(names_in) if names_in is not None else tuple(f"u{i}" for i in range(m))
        self.output_names_ = tuple(names_out) if names_out is not None else tuple(f"y{i}" for i in range(p))
        if len(self.input_names_) != m or len(self.output_names_) != p:
            raise SessionError(f"input_names/output_names must name the {m} input(s) and {p} output(s) of the data; "
                               f"got {len(self.input_names_)} and {len(self.output_names_)}.")
        self.input_units_, self.output_units_ = ("uA",) * m, ("",) * p
        self.n_columns_ = self._factor.n_columns_
        self._blocks = None
        return self

    def _scaled(self):
        """Blocks of the unit-RMS data, the channel scales, the absolute strength and the regulariser matrix."""
        if self._blocks is not None:
            return self._blocks
        if getattr(self._factor, "_R", None) is None:
            raise NotFittedError("the online Hankel predictor has no Hankel windows yet; update it with samples first.")
        m, p, T, N = self.n_inputs_, self.n_outputs_, self.past_steps_, self.max_horizon_steps_
        sc = self._factor.channel_scale_
        rows = np.concatenate([np.tile(sc[:m], T), np.tile(sc[m:], T), np.tile(sc[:m], N), np.tile(sc[m:], N)])
        F = self._factor.hankel_factor() / rows[:, None]
        blocks = HankelBlocks.from_matrix(F, m, p, T, N, True)
        M = _projection_complement(blocks.D, self.n_columns_) if self.regularizer == "projection" else None
        self._blocks = (blocks, sc, self.lambda_g * _data_scale(F), M)
        return self._blocks

    def data_blocks(self) -> DataBlocks:
        """The blocks in the channels' units, the regulariser and strengths, as ``HankelPredictor.data_blocks()``."""
        b, sc, lam_g, M = self._scaled()
        m, T, N = self.n_inputs_, self.past_steps_, self.max_horizon_steps_
        su, sy = sc[:m], sc[m:]
        return DataBlocks(Up=np.tile(su, T)[:, None] * b.Up, Yp=np.tile(sy, T)[:, None] * b.Yp,
                          Uf=np.tile(su, N)[:, None] * b.Uf, Yf=np.tile(sy, N)[:, None] * b.Yf,
                          regularizer=self.regularizer, lambda_g=float(lam_g),
                          lambda_y=self.lambda_y / float(np.mean(sy ** 2)),
                          reg_matrix=np.eye(b.Up.shape[1]) if M is None else M,
                          output_offset=np.zeros(self.n_outputs_))

    def predict(self, u_past, y_past, u_future):
        """The predicted outputs ``(len(u_future), n_outputs)`` from the last ``past_steps_`` samples of the past.

        Future inputs beyond those given are held at zero, as in the batch predictor.
        """
        b, sc, lam_g, M = self._scaled()
        m, p, T, N = self.n_inputs_, self.n_outputs_, self.past_steps_, self.max_horizon_steps_
        u_past, y_past = np.asarray(u_past, np.float64), np.asarray(y_past, np.float64)
        u_future = np.asarray(u_future, np.float64).reshape(-1, m)
        h = u_future.shape[0]
        if u_past.shape[0] < T or y_past.shape[0] < T or h > N:
            raise SessionError(f"the online Hankel predictor needs {T} past samples and at most {N} future inputs; "
                               f"got {u_past.shape[0]}, {y_past.shape[0]} and {h}.")
        uf = np.zeros((N, m))
        uf[:h] = u_future
        col = np.concatenate([(u_past[-T:] / sc[:m]).reshape(-1), (y_past[-T:] / sc[m:]).reshape(-1),
                              (uf / sc[:m]).reshape(-1)])
        g = _kkt_map(b, M, lam_g, self.lambda_y, col[:, None])[:, 0]
        return ((b.Yf @ g).reshape(N, p) * sc[m:])[:h]

    def rest_window(self):
        """The past window of a system at rest: zeros (no output centring)."""
        return np.zeros((self.past_steps_, self.n_inputs_)), np.zeros((self.past_steps_, self.n_outputs_))
