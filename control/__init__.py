"""stimsteer.control: from predictors to stimulation plans, closed loops, benchmarks and reports."""

from ..sysid.caution import CAUTION
from .limits import StimLimits, load_limits, shannon_k, max_charge_uc, max_amplitude_ua
from .schedule import SCHEDULE_KINDS, Schedule, design_schedule, save_schedule, load_schedule
from .mpc import Plan, ModelPredictiveController, DataPredictiveController, controller_for
from .plants import LinearNetworkPlant, SaturatingRateNetworkPlant, random_network, record_session, save_plant, load_plant
from .loop import LoopResult, run_closed_loop
from .evaluation import BenchSettings, BenchResult, MethodSpec, ControlSettings, run_bench
from .plants import InnovationPlant
from .report import summarize
from .commands.bench import write_bench, write_bench as write_report


def __getattr__(name):
    # ``main`` is loaded on first use, not at import: ``python -m stimsteer.control.cli`` would otherwise find the
    # module already imported by its own package and warn that it may behave unpredictably.
    if name == "main":
        from .cli import main

        return main
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


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
