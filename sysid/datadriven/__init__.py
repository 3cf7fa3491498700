"""The direct route: multi-step predictors built straight from Hankel matrices of the recorded trials.

Both predictors use windows of ``L = Tini + N`` samples (past window ``Tini = past_steps``, horizon
``N = horizon_steps``), stacked time-major (see :mod:`stimsteer.sysid.hankel`) into the data matrix

    H = [Up; Yp; Uf; Yf]        Up (m·Tini, K), Yp (p·Tini, K), Uf (m·N, K), Yf (p·N, K),

whose ``K`` columns are every window inside a valid segment (never across a trial boundary or a masked sample).
``D = [Up; Yp; Uf]`` is the part a prediction conditions on, ``b = [vec(u_past); vec(y_past); vec(u_future)]``.

* :class:`LsqPredictor` — subspace predictive control's predictor: ``vec(y_future) = Θ b`` with ``Θ = [Kp Kf]``
  the ridge least-squares fit of ``Yf`` on ``D``.
* :class:`HankelPredictor` — the regularised DeePC-style predictor: find ``g`` with ``Up g = u_past``,
  ``Uf g = u_future``, a penalised slack on ``Yp g − y_past``, and predict ``Yf g``.

Exact compression: ``H = F Qᵀ`` with ``F`` the (n_rows × r) row-space factor (``r ≤ n_rows``) and ``Q`` orthonormal.
Every cost of the least-squares and of the ℓ2 / projection Hankel problems depends on ``g`` only through ``Qᵀ g``
and ``||g||²`` or ``||(I − Π) g||²``, both minimised with ``g ⊥ range(Q)`` set to zero, so replacing ``H`` by ``F``
(and ``g`` by ``h = Qᵀ g``) gives the same prediction with an unknown of the dimension of the rows. ``F`` is
streamed segment by segment (:func:`~stimsteer.sysid.hankel.row_space_factor`): memory does not grow with the
number of samples.

Strengths are relative to the data, so one grid fits sessions of any length and units: every input and output
channel is first divided by its root mean square (``channel_scale_``), so predictions do not depend on units
(µV or mV give the same predictions up to the factor), and with ``s = ||H||_F² / n_rows`` of these rows (the mean squared singular value per row of ``H``), the absolute ridge strength is
``alpha · s`` and the absolute ``λ_g`` is ``lambda_g · s`` (``lambda_g · s / sqrt(K / n_rows)`` for ℓ1, which
makes ``λ_g ||g||_1`` of the size of ``λ_g ||g||²`` for a dense ``g``). Strengths are chosen on held-out trials
inside the training session (folds of whole trials, seeded).

No intercept is fitted: remove offsets first (``stimsteer.sysid.prep``) when the outputs rest away from zero.
"""

from __future__ import annotations

from .hankel_predictor import HankelBlocks, HankelPredictor, REGULARIZERS
from .lsq import LsqPredictor

__all__ = ["HankelBlocks", "LsqPredictor", "HankelPredictor", "REGULARIZERS"]


