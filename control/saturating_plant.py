"""The saturating rate network plant: leaky tanh units with the linear read-out and recording model of the other
network plants (see :mod:`stimsteer.control.plants`)."""

from __future__ import annotations

import numpy as np

from ..sysid import SessionError, StateSpaceModel, UnstableModelError
from ._plant_params import _network_matrices
from .network_plant import _NetworkPlant

__all__ = ["SaturatingRateNetworkPlant"]


class SaturatingRateNetworkPlant(_NetworkPlant):
    """A leaky rate network with a tanh saturation: linear for weak stimulation, bounded for strong.

    ``x_{k+1} = (1 − leak) x_k + leak · tanh(W x_k + B u_k + bias) + w_k``,
    ``y_k = C x_k + D u_k + v_k + d_k + G s_k`` (module docstring).

    Parameters
    ----------
    W : ndarray, shape (n_nodes, n_nodes)
        Recurrent coupling (dimensionless), e.g. :func:`random_network`; ``σ_max(W) < 1`` makes the map a
        contraction with one rest state.
    B : ndarray, shape (n_nodes, n_inputs)
        Drive per µA (dimensionless per µA).
    C, D : ndarray
        Read-out as in :class:`LinearNetworkPlant`.
    leak : float, default 0.2
        In (0, 1]: the fraction of the way each node moves to its saturated drive per sample.
    bias : ndarray, shape (n_nodes,), optional
        Constant drive; default zero (then the rest state is 0).
    process_noise_std, measurement_noise_std, drift_amplitude, drift_period_s, drift_step_std, artifact_gain,
    artifact_decay_s, sample_rate_hz, input_names, output_names, seed
        As in :class:`LinearNetworkPlant`.
    require_stable : bool, default True
        Refuse a network whose linearisation at rest has spectral radius >= 1.

    Raises
    ------
    SessionError
        As in :class:`LinearNetworkPlant`, and for a leak outside (0, 1].
    UnstableModelError
        When no rest state is found, or (``require_stable``) the rest state is unstable.

    Notes
    -----
    States started inside [−1, 1]ⁿ stay there without process noise: each step is a convex combination of the
    state and a tanh value.
    """

    plant_type = "saturating_rate_network"
    _MATRICES = ("W", "B", "C", "D")

    def __init__(self, W, B, C, D=None, *, leak=0.2, bias=None, process_noise_std=0.0, measurement_noise_std=0.0,
                 drift_amplitude=0.0, drift_period_s=60.0, drift_step_std=0.0, artifact_gain=None,
                 artifact_decay_s=0.005, sample_rate_hz=1.0, input_names=None, output_names=None, seed=0,
                 require_stable=True):
        W, B, C, D = _network_matrices("W", W, B, C, D)
        n, m, p = W.shape[0], B.shape[1], C.shape[0]
        leak = float(leak)
        if not 0 < leak <= 1:
            raise SessionError(f"leak must be in (0, 1], the fraction moved per sample; got {leak}.")
        bias = np.zeros(n) if bias is None else np.asarray(bias, dtype=np.float64)
        if bias.shape != (n,) or not np.all(np.isfinite(bias)):
            raise SessionError(f"bias must be a finite vector of shape ({n},); got shape {bias.shape}.")
        bias = bias.copy()
        bias.setflags(write=False)
        self.W, self.B, self.C, self.D, self.leak, self.bias = W, B, C, D, leak, bias
        self._init_recording(
            m=m, n=n, p=p, process_noise_std=process_noise_std, measurement_noise_std=measurement_noise_std,
            drift_amplitude=drift_amplitude, drift_period_s=drift_period_s, drift_step_std=drift_step_std,
            artifact_gain=artifact_gain, artifact_decay_s=artifact_decay_s, sample_rate_hz=sample_rate_hz,
            input_names=input_names, output_names=output_names, seed=seed, require_stable=require_stable)
        self._rest = self._fixed_point(np.zeros(m))
        self._rest.setflags(write=False)
        rho = self.linearize().spectral_radius
        if self.require_stable and rho >= 1:
            raise UnstableModelError(
                f"the rate network's linearisation at rest has spectral radius {rho:.4f} >= 1, so its rest state is "
                "unstable. Use a coupling W with sigma_max(W) < 1 (see random_network) or pass require_stable=False."
            )
        self.reset()

    def _extra_params(self) -> dict:
        return {"leak": self.leak, "bias": self.bias}

    def _read_out(self, x, u):
        return self.C @ x + self.D @ u

    def _advance(self, x, u):
        return (1.0 - self.leak) * x + self.leak * np.tanh(self.W @ x + self.B @ u + self.bias)

    def _fixed_point(self, u0: np.ndarray, max_iter: int = 20000, tol: float = 1e-13) -> np.ndarray:
        x = np.zeros(self.n_states)
        drive = self.B @ u0 + self.bias
        for _ in range(max_iter):
            x_new = (1.0 - self.leak) * x + self.leak * np.tanh(self.W @ x + drive)
            if np.max(np.abs(x_new - x), initial=0.0) <= tol:
                return x_new
            x = x_new
        raise UnstableModelError(
            f"the rate network did not settle to a rest state within {max_iter} samples under a constant input "
            f"{u0.tolist()}. Use a coupling W with sigma_max(W) < 1 (see random_network) or a smaller bias."
        )

    def rest_state(self, u0=None) -> np.ndarray:
        """The equilibrium ``x* = tanh(W x* + B u0 + bias)`` (default ``u0 = 0``), shape (n_states,)."""
        if u0 is None and hasattr(self, "_rest"):
            return self._rest.copy()
        return self._fixed_point(np.zeros(self.n_inputs) if u0 is None else self._check_u_k(u0))

    def linearize(self, u0=None) -> StateSpaceModel:
        """The linear model of small deviations around the equilibrium under the constant input ``u0``.

        Returns
        -------
        StateSpaceModel
            ``δx_{k+1} = A δx_k + B δu_k``, ``δy_k = C δx_k + D δu_k`` with
            ``A = (1 − leak) I + leak · diag(s) W``, ``B = leak · diag(s) B_plant``,
            ``s = 1 − tanh²(W x* + B u0 + bias)``; ``info`` holds the operating state ``x*``, input ``u0`` and output
            ``C x* + D u0``.

        Raises
        ------
        UnstableModelError
            When the network does not settle under ``u0``.
        """
        u0 = np.zeros(self.n_inputs) if u0 is None else self._check_u_k(u0)
        x_star = self.rest_state(u0)
        s = 1.0 - np.tanh(self.W @ x_star + self.B @ u0 + self.bias) ** 2
        A = (1.0 - self.leak) * np.eye(self.n_states) + self.leak * s[:, None] * self.W
        B = self.leak * s[:, None] * self.B
        info = {"operating_state": x_star.tolist(), "operating_input": u0.tolist(),
                "operating_output": (self.C @ x_star + self.D @ u0).tolist(),
                "source": "SaturatingRateNetworkPlant linearisation"}
        return StateSpaceModel(A=A, B=B, C=self.C, D=self.D, sample_rate_hz=self.sample_rate_hz,
                               input_names=self.input_names, output_names=self.output_names, info=info)

