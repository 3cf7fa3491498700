"""stimsteer.sysid: from recorded stimulation sessions to predictors (the identification layer)."""

from .exceptions import StimsteerError, SessionError, InvalidParameterError, FileFormatError, NotFittedError, UnstableModelError, ExcitationError, LimitsError, InfeasiblePlanError, SolverError, StimsteerWarning, ExcitationWarning, ConditioningWarning
from ._base import BaseEstimator, BasePredictor, check_fitted
from .protocols import Predictor, LinearPredictor, PredictionMaps, StateSpaceForm, DataBlocks, DataBlocksForm, Plant
from .session import Session, TrialLayout, TrialWindow, TrialSplit
from .io import load_session, save_session, open_session_file, SessionFile
from .prep import detrend, filter_session, resample_session, SessionScaler, blank_artifacts
from .quality import describe_session, SessionSummary
from .excitation import excitation_report, ExcitationReport, pe_order, required_order
from .hankel import block_hankel, mosaic_hankel, page_matrix, mosaic_page, session_hankel, session_page
from .arx import RidgeArx, arx_to_state_space
from .subspace import SubspaceId
from .statespace import StateSpaceModel, kalman_gain, markov_toeplitz
from .datadriven import LsqPredictor, HankelPredictor, HankelBlocks
from .metrics import r2, nrmse, vaf, Scores, kstep_scores, freerun_scores, ljung_box, input_residual_xcorr
from .network import impulse_responses, controlled_response, controllability, controllability_gramian, site_controllability, minimum_energy_transition, pattern_transition, rank_sites
from .signals import ExcitationCheck, verify_excitation, max_length_sequence, multisine, crest_factor
from .storage import save_predictor, load_predictor
from .registry import MethodEntry
from .routes import fit_route, make_estimator, FitResult, METHODS
from .trial_sources import open_session_source
from .patterns import Pattern, PatternPrediction, load_pattern, predict_pattern, rest_window, trial_end_window
from .protocols import InputAffineForm, IntervalForm, RecruitmentForm
from .lifted import LiftedPredictor
from .hammerstein import HammersteinArx, Recruitment
from .ensemble import BootstrapEnsemble, interval_coverage, resample_trials
from .recursive import RecursiveRidgeArx
from .switched import ModelSequence
from .conditions import ConditionFits, condition_change_table, fit_per_condition, sliding_window_fits, step_gains
from .conditions import condition_heldout_scores, gain_steps_from_data, window_change_table
from . import from_recording  # noqa: F401  (adds Session.from_mne and Session.from_neo)

__all__ = [
    "InputAffineForm", "IntervalForm", "RecruitmentForm", "LiftedPredictor", "HammersteinArx", "Recruitment", "BootstrapEnsemble",
    "interval_coverage", "resample_trials", "RecursiveRidgeArx", "ModelSequence", "ConditionFits", "condition_change_table",
    "fit_per_condition", "sliding_window_fits", "step_gains",
    "window_change_table", "condition_heldout_scores", "gain_steps_from_data",
    "BaseEstimator",
    "BasePredictor",
    "DataBlocks",
    "DataBlocksForm",
    "InvalidParameterError",
    "LinearPredictor",
    "Plant",
    "PredictionMaps",
    "Predictor",
    "StateSpaceForm",
    "check_fitted",
    "ConditioningWarning",
    "ExcitationCheck",
    "ExcitationError",
    "ExcitationReport",
    "ExcitationWarning",
    "FileFormatError",
    "FitResult",
    "HankelBlocks",
    "HankelPredictor",
    "InfeasiblePlanError",
    "LimitsError",
    "LsqPredictor",
    "METHODS",
    "MethodEntry",
    "Pattern",
    "PatternPrediction",
    "load_pattern",
    "make_estimator",
    "open_session_source",
    "predict_pattern",
    "rest_window",
    "trial_end_window",
    "NotFittedError",
    "RidgeArx",
    "Scores",
    "Session",
    "SessionError",
    "SessionFile",
    "SessionScaler",
    "SessionSummary",
    "SolverError",
    "StateSpaceModel",
    "StimsteerError",
    "StimsteerWarning",
    "SubspaceId",
    "TrialLayout",
    "TrialSplit",
    "TrialWindow",
    "UnstableModelError",
    "arx_to_state_space",
    "blank_artifacts",
    "block_hankel",
    "controllability",
    "crest_factor",
    "controllability_gramian",
    "controlled_response",
    "describe_session",
    "detrend",
    "excitation_report",
    "filter_session",
    "fit_route",
    "freerun_scores",
    "impulse_responses",
    "input_residual_xcorr",
    "kalman_gain",
    "markov_toeplitz",
    "kstep_scores",
    "ljung_box",
    "load_predictor",
    "max_length_sequence",
    "load_session",
    "minimum_energy_transition",
    "mosaic_hankel",
    "mosaic_page",
    "multisine",
    "nrmse",
    "open_session_file",
    "page_matrix",
    "pattern_transition",
    "pe_order",
    "r2",
    "rank_sites",
    "required_order",
    "resample_session",
    "save_predictor",
    "save_session",
    "session_hankel",
    "session_page",
    "site_controllability",
    "vaf",
    "verify_excitation",
]
