"""stimsteer.control: from predictors to stimulation plans, closed loops, benchmarks and reports.

The names below are loaded at their first use (PEP 562), so that importing one module of the package (a command,
a plant) does not import every other one: the report's figures (matplotlib) or the benchmark only when asked for.
"""

import importlib

from ..sysid.caution import CAUTION

# public name -> (module of this package, its name there)
_LAZY = {
    **{n: ("limits", n) for n in ("StimLimits", "load_limits", "shannon_k", "max_charge_uc", "max_amplitude_ua")},
    **{n: ("schedule", n) for n in ("SCHEDULE_KINDS", "Schedule", "design_schedule", "save_schedule",
                                    "load_schedule")},
    **{n: ("mpc", n) for n in ("Plan", "ModelPredictiveController", "DataPredictiveController", "controller_for")},
    **{n: ("plants", n) for n in ("LinearNetworkPlant", "SaturatingRateNetworkPlant", "random_network",
                                  "record_session", "save_plant", "load_plant", "InnovationPlant")},
    **{n: ("loop", n) for n in ("LoopResult", "run_closed_loop")},
    **{n: ("evaluation", n) for n in ("BenchSettings", "BenchResult", "MethodSpec", "ControlSettings", "run_bench")},
    "summarize": ("report", "summarize"),
    "write_bench": ("commands.bench", "write_bench"),
    "write_report": ("commands.bench", "write_bench"),
    # ``main`` is loaded on first use, not at import: ``python -m stimsteer.control.cli`` would otherwise find the
    # module already imported by its own package and warn that it may behave unpredictably
    "main": ("cli", "main"),
}


def __getattr__(name):
    if name in _LAZY:
        module, attr = _LAZY[name]
        value = getattr(importlib.import_module(f".{module}", __name__), attr)
        if name != "main":
            globals()[name] = value  # found directly from now on
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_LAZY))


__all__ = [
    "BenchResult",
    "BenchSettings",
    "CAUTION",
    "ControlSettings",
    "DataPredictiveController",
    "InnovationPlant",
    "LinearNetworkPlant",
    "LoopResult",
    "MethodSpec",
    "ModelPredictiveController",
    "Plan",
    "SCHEDULE_KINDS",
    "SaturatingRateNetworkPlant",
    "Schedule",
    "StimLimits",
    "controller_for",
    "design_schedule",
    "load_limits",
    "load_plant",
    "load_schedule",
    "main",
    "max_amplitude_ua",
    "max_charge_uc",
    "random_network",
    "record_session",
    "run_bench",
    "run_closed_loop",
    "save_plant",
    "save_schedule",
    "shannon_k",
    "summarize",
    "write_bench",
    "write_report",
]
