"""Network-control figures of a linear model: responses, controllability, minimum-energy transitions.

A fitted :class:`~stimsteer.sysid.statespace.StateSpaceModel` (or any matrices ``(A, B, C)``) is read as a network
whose nodes are the states, whose stimulation sites are the columns of ``B`` and whose recorded channels are the
rows of ``C``:

    x[k+1] = A x[k] + B u[k],        y[k] = C x[k] + D u[k].

A fitted model's states are arbitrary coordinates: quote the figures of :mod:`.outputs` (output Gramians, squared
H2 norms, output controllability, output-pattern energies), which do not depend on them. Average and modal
controllability of ``A`` are state-coordinate figures, meaningful for a network map whose states are its nodes.

Everything here is noise-free and deterministic. Every function takes ``system``: a ``StateSpaceModel`` or a tuple
``(A,)``, ``(A, B)``, ``(A, B, C)`` or ``(A, B, C, D)`` (missing ``B`` / ``C`` default to the identity: one input
site and one recorded channel per node, the setting of the network-control literature).

References
----------
Kalman R.E., Ho Y.C., Narendra K.S. (1963), Controllability of linear dynamical systems, Contrib. Diff. Eq. 1:189.
Pasqualetti F., Zampieri S., Bullo F. (2014), Controllability metrics, limitations and algorithms for complex
networks, IEEE Trans. Control Netw. Syst. 1:40.
Gu S. et al. (2015), Controllability of structural brain networks, Nat. Commun. 6:8414.
"""

from __future__ import annotations

from .systems import network_model, normalised_network, NORMALISATION_NONE, NORMALISATION_SIGMA
from .responses import impulse_responses, controlled_response, ControlledResponse
from .controllability import (
    reachability_matrix, controllability_gramian, controllability, site_controllability, ControllabilityReport,
    SiteControllability
)
from .patterns import pattern_to_state, PatternState
from .energy import minimum_energy_transition, pattern_transition, EnergyTransition, PatternTransition
from .ranking import rank_sites, SiteRanking
from .maps import NetworkMap, read_network_map, map_model
from .conditions import condition_figures, trial_conditions, ConditionFigures
from .outputs import (
    output_gramian, output_controllability, site_output_controllability, output_transition, rank_sites_by_output,
    OutputControllability, SiteOutputControllability, OutputTransition, OutputSiteRanking
)

__all__ = ["network_model", "normalised_network", "impulse_responses", "controlled_response", "reachability_matrix",
           "controllability_gramian", "controllability", "site_controllability", "pattern_to_state",
           "minimum_energy_transition", "pattern_transition", "rank_sites", "ControlledResponse",
           "ControllabilityReport", "SiteControllability", "PatternState", "EnergyTransition", "PatternTransition",
           "SiteRanking", "NORMALISATION_NONE", "NORMALISATION_SIGMA", "output_gramian", "output_controllability",
           "site_output_controllability", "output_transition", "rank_sites_by_output", "OutputControllability",
           "SiteOutputControllability", "OutputTransition", "OutputSiteRanking", "NetworkMap", "read_network_map",
           "map_model", "condition_figures", "trial_conditions", "ConditionFigures"]


