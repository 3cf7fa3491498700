"""Stimulation as it is delivered: the description of each site in physical units (pint), the declared mapping to
the model input, recorded pulse events onto the model grid, and plans back into pulses.

See :mod:`.description` for the file layout, :mod:`.mapping` for the mapping kinds and :mod:`.pulses` for the
checks every recorded pulse passes.
"""

from .description import ElectricalSite, OpticalSite, StimulationDescription, load_stimulation
from .mapping import MAPPING_RULES, InputMapping
from .pulses import PULSE_COLUMNS, decode_plan, encode_pulse_table, parameter_segments
from .records import PULSE_TABLE_COLUMNS, pulse_table_from_record, pulse_table_record
from .units import UREG, convert, key_unit, parse_quantity

__all__ = ["ElectricalSite", "OpticalSite", "StimulationDescription", "load_stimulation", "MAPPING_RULES",
           "InputMapping", "PULSE_COLUMNS", "decode_plan", "encode_pulse_table", "parameter_segments", "UREG",
           "convert", "key_unit", "parse_quantity", "PULSE_TABLE_COLUMNS", "pulse_table_record",
           "pulse_table_from_record"]
