"""Subspace identification of a state-space model from block-Hankel data (N4SID, MOESP and CVA weightings).

The data of all trials are summarised by one Gram matrix of the multi-trial (mosaic) block-Hankel matrix of the
joint signal ``[u y]``; Hankel columns are built only inside valid segments (:meth:`Session.segments`), so none
straddles a trial boundary or touches a masked sample. The LQ factorisation ``[Uf; Up; Yp; Yf] = L Q`` of the
stacked data has ``L Lᵀ`` equal to that Gram matrix, so every projection the LQ route forms is written here with
Gram blocks (Schur complements) instead: after the one data pass nothing depends on the number of samples, and
fitting costs about one Gram of the Hankel matrix however many orders are tried.
"""

from __future__ import annotations

from .estimator import SubspaceId
from .closed_loop import ClosedLoopSubspaceId

__all__ = ["SubspaceId", "ClosedLoopSubspaceId"]
