"""Shannon's charge-density rule (Shannon 1992) and the amplitude bound it gives for a pulse width and a contact.

With charge per phase ``Q = I · PW`` (µC) and charge density ``D = Q / A`` (µC/cm²/phase), the rule
``log10(D) + log10(Q) <= k`` gives ``Q <= sqrt(k_lin · A)`` with ``k_lin = 10**k``, hence
``|I| <= sqrt(10**k · A) / PW``. Shannon reports tissue damage at ``k >= 1.85``; :class:`StimLimits
<stimsteer.control.limits.StimLimits>` refuses a declared ``k`` at or above it. The default ``k = 1.75`` is a margin
below that threshold (common practice, no source). Shannon's data come from macroelectrodes; for smaller contacts
:mod:`stimsteer.control.physical_limits` requires a declared material charge-injection limit instead.

References
----------
Shannon R.V. (1992), A model of safe levels for electrical stimulation, IEEE Trans. Biomed. Eng. 39(4):424–426.
"""

from __future__ import annotations

import numpy as np

from ..sysid.exceptions import LimitsError

__all__ = ["shannon_k", "max_charge_uc", "max_amplitude_ua", "DEFAULT_SHANNON_K", "SHANNON_DAMAGE_K"]

#: Default Shannon k: a margin below the damage threshold (common practice, no source).
DEFAULT_SHANNON_K = 1.75
#: Shannon (1992): tissue damage was seen at k >= 1.85.
SHANNON_DAMAGE_K = 1.85


def _positive(name, value):
    a = np.asarray(value, dtype=np.float64)
    if not np.all(np.isfinite(a)) or np.any(a <= 0):
        raise LimitsError(f"{name} must be positive and finite; got {value!r}.")
    return a


def shannon_k(charge_uc, area_cm2):
    """Shannon's ``k = log10(D) + log10(Q)`` of a charge per phase on an electrode.

    Parameters
    ----------
    charge_uc : float or ndarray
        Charge per phase ``Q``, µC/phase.
    area_cm2 : float or ndarray
        Geometric electrode area ``A``, cm².

    Returns
    -------
    float or ndarray
        ``log10(Q / A) + log10(Q)``.

    Raises
    ------
    LimitsError
        If a charge or area is not positive and finite.

    References
    ----------
    Shannon R.V. (1992), A model of safe levels for electrical stimulation, IEEE TBME 39(4):424–426.

    Examples
    --------
    >>> round(float(shannon_k(1.8, 0.06)), 3)  # 30 µC/cm² on a 0.06 cm² contact
    1.732
    """
    q = _positive("charge_uc", charge_uc)
    a = _positive("area_cm2", area_cm2)
    k = np.log10(q / a) + np.log10(q)
    return float(k) if k.ndim == 0 else k


def max_charge_uc(k, area_cm2):
    """Largest charge per phase (µC) allowed by Shannon's rule ``log10(Q/A) + log10(Q) <= k``.

    Notes
    -----
    ``2 log10(Q) − log10(A) <= k``  ⇔  ``Q <= sqrt(10**k · A)``.

    Examples
    --------
    >>> round(float(max_charge_uc(1.85, 0.06)), 3)
    2.061
    """
    k = np.asarray(k, dtype=np.float64)
    if not np.all(np.isfinite(k)):
        raise LimitsError(f"shannon_k must be finite; got {k!r}.")
    a = _positive("area_cm2", area_cm2)
    q = np.sqrt(10.0**k * a)
    return float(q) if q.ndim == 0 else q


def max_amplitude_ua(k, area_cm2, pulse_width_us):
    """Largest current amplitude (µA) whose charge per phase ``Q = I · PW`` meets Shannon's rule.

    Parameters
    ----------
    k : float
        Shannon's k.
    area_cm2 : float or ndarray
        Electrode area, cm².
    pulse_width_us : float or ndarray
        Duration of one phase, µs.

    Returns
    -------
    float or ndarray
        ``sqrt(10**k · A) / PW`` converted to µA (1 µC / 1 µs = 10⁶ µA).

    Examples
    --------
    >>> round(float(max_amplitude_ua(1.85, 0.06, 100.0)), 1)  # 2.061 µC in 100 µs
    20609.9
    """
    pw = _positive("pulse_width_us", pulse_width_us)
    i = max_charge_uc(k, area_cm2) / pw * 1e6
    return float(i) if np.ndim(i) == 0 else i
