"""stimsteer.control: from predictors to stimulation plans, closed loops, benchmarks and reports."""

from .limits import StimLimits, load_limits, shannon_k, max_charge_uc, max_amplitude_ua
from .mpc import Plan, ModelPredictiveController, DataPredictiveController, controller_for
from .plants import LinearNetworkPlant, SaturatingRateNetworkPlant, random_network, record_session, save_plant, load_plant
from .loop import LoopResult, run_closed_loop
from .evaluation import BenchSettings, BenchResult, MethodSpec, ControlSettings, run_bench
from .report import summarize
from .commands.bench import write_bench as write_report
from .cli import CAUTION, main

__all__ = [
    "BenchResult",
    "BenchSettings",
    "CAUTION",
    "ControlSettings",
    "DataPredictiveController",
    "LinearNetworkPlant",
    "LoopResult",
    "MethodSpec",
    "ModelPredictiveController",
    "Plan",
    "SaturatingRateNetworkPlant",
    "StimLimits",
    "controller_for",
    "load_limits",
    "load_plant",
    "main",
    "max_amplitude_ua",
    "max_charge_uc",
    "random_network",
    "record_session",
    "run_bench",
    "run_closed_loop",
    "save_plant",
    "shannon_k",
    "summarize",
    "write_report",
]
