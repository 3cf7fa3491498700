"""The declared mapping from delivered stimulation to the model input, and back.

The model sees one **non-negative** quantity per site and sample (polarity and contact configuration are
categories of the site, never a sign):

``"amplitude"``
    the leading-phase amplitude of the site's train at its fixed phase width and frequency, in the site's
    ``amplitude_unit`` (µA or mA; mW/mm² for an optical site). A pulse's amplitude is held for one pulse period
    ``1 / f`` after its onset: a sample holds the largest amplitude of the pulses whose held period meets it; other
    samples are 0. A plan decodes to one pulse at each onset ``t₀ + n / f`` with the amplitude of the sample that
    holds the onset (no pulse where it is 0).
``"charge_rate"``
    the charge per phase delivered per second, µC/s (electrical sites): ``amplitude · PW · f``, with the amplitude
    held as above.

Either way the model input is ``gain · I`` with a per-site gain (model units per µA, or per mW/mm²), so limits on
the delivered amplitude become bounds on the model input, and the charge a sample can deliver is at most
``n_max · PW · I`` with ``n_max = ceil(f / rate)`` pulse onsets per sample period.
"""

from __future__ import annotations

import math

import numpy as np

from .description import StimulationDescription

__all__ = ["InputMapping", "MAPPING_RULES"]

#: One sentence per mapping kind, recorded with the mapping.
MAPPING_RULES = {
    "amplitude": "model input = leading-phase amplitude of each site's train at its fixed phase width and frequency "
                 "(held one pulse period after each onset; largest in a sample; 0 without pulses)",
    "charge_rate": "model input = charge per phase per second, uC/s = amplitude x phase width x frequency (amplitude "
                   "held one pulse period after each onset)",
}


class InputMapping:
    """The mapping of a :class:`StimulationDescription` at a sample rate (see the module docstring).

    Parameters
    ----------
    description : StimulationDescription
    sample_rate_hz : float
        The model grid's rate.
    """

    def __init__(self, description: StimulationDescription, sample_rate_hz: float):
        self.description = description
        self.sample_rate_hz = float(sample_rate_hz)
        self.kind = description.mapping

    @property
    def sites(self):
        return self.description.sites

    def gain(self) -> np.ndarray:
        """Model units per µA (per mW/mm² for optical sites), shape (n_sites,)."""
        g = []
        for s in self.sites:
            if self.kind == "charge_rate":
                g.append(s.phase_width_us * 1e-6 * s.frequency_hz)  # µA · s · Hz → µC/s
            else:
                g.append(1.0 / s.amplitude_factor_ua())
        return np.array(g)

    def model_units(self) -> tuple:
        """The unit of each model input."""
        return tuple("uC/s" if self.kind == "charge_rate" else s.amplitude_unit for s in self.sites)

    def pulses_per_sample(self) -> np.ndarray:
        """Largest number of pulse onsets in one sample period, per site: ``ceil(f / rate)``."""
        return np.array([max(1, math.ceil(s.frequency_hz / self.sample_rate_hz - 1e-12)) for s in self.sites])

    def charge_per_model_unit_uc(self) -> np.ndarray:
        """Largest charge per phase one sample can deliver per model unit, µC (0 for optical sites)."""
        c = []
        for s, g, n in zip(self.sites, self.gain(), self.pulses_per_sample()):
            c.append(0.0 if s.kind == "optical" else n * s.phase_width_us * 1e-6 / g)
        return np.array(c)

    def to_model(self, amplitude) -> np.ndarray:
        """Physical amplitudes (µA; mW/mm² for optical), shape (T, n_sites), to model inputs."""
        return np.asarray(amplitude, np.float64) * self.gain()[None, :]

    def to_physical(self, u) -> np.ndarray:
        """Model inputs, shape (T, n_sites), to physical amplitudes (µA; mW/mm² for optical)."""
        return np.asarray(u, np.float64) / self.gain()[None, :]

    def record(self) -> dict:
        """What the session metadata and the model file record about the mapping."""
        return {"name": self.kind, "rule": MAPPING_RULES[self.kind], "sample_rate_hz": self.sample_rate_hz,
                "model_units": list(self.model_units()), "gain_per_physical_unit": self.gain().tolist(),
                "physical_units": ["mW/mm^2" if s.kind == "optical" else "uA" for s in self.sites],
                "description": self.description.to_dict(), "source": "stimsteer.sysid.stimulation"}
