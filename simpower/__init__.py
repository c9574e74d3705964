"""simpower: statistical power by Monte Carlo simulation, checked against closed forms.

Describe the data you expect (a process) and the analysis you plan, run it
thousands of times, and read power, type I error, bias and coverage with their
Monte Carlo error.
"""

from ._version import __version__

from . import analytic
from .analyses.base import Analysis, BatchResult, TestResult, as_batch_result, as_test_result
from .analyses.bayes import PosteriorProbability
from .analyses.binary import ChiSquare, FisherExact, Logistic, TwoProportions
from .analyses.clustered import GEE, ClusterMeansT, FinalVisitT
from .analyses.counts import NegBinGLM, PoissonGLM
from .analyses.equivalence import TOST, NonInferiority
from .analyses.mixed import MixedModel
from .analyses.multiarm import AnovaF, Dunnett
from .analyses.multiplicity import Multiple
from .analyses.nonparametric import MannWhitney, WilcoxonSignedRank
from .analyses.regression import OLS, Ancova
from .analyses.resampling import BootstrapCI, LogT, PermutationTest
from .analyses.survival import Cox, LogRank
from .analyses.ttests import PairedT, TTest, WelchT, ZTest
from .engine import RunInterrupted, run, run_many
from .engine.store import RunStore, open_store
from .errors import ParameterError, RunError, ScenarioFileError, SimpowerError, StoreError, UnknownNameError
from .processes.arms import MultiArm, TwoArm
from .batch import Batch
from .processes.base import Missingness, Outcome, Process
from .processes.binary import BinaryTwoArm
from .processes.clusters import ClusterTrial
from .processes.counts import CountTwoArm
from .processes.dropout import Dropout
from .processes.missing import MAR, MCAR, MNAR
from .processes.normal import NormalOneSample, NormalPaired, NormalTwoArm
from .processes.outcomes import (ContaminatedNormal, Fleishman, Gamma, Lognormal, Normal, ScipyOutcome,
                                 SkewNormal, StudentT)
from .processes.pilot import PilotResample
from .processes.pilot_units import PilotUnits
from .processes.repeated import RepeatedMeasures
from .processes.survival import SurvivalTwoArm
from .result import Records, RunResult
from .planning.assurance import AssuranceResult, assurance, required_n_for_assurance
from .planning.search import SearchResult, detectable_effect, required_n
from .planning.sequential import MemoryStore, point_key, run_many_to_mcse, run_to_mcse
from .planning.sweep import Grid, Range, null_check, sweep
from .scenario import Scenario
from .scenario_files import load as load_scenario
from .execution import Execution
from .study import PlanResult, StudyPlan, execute, load_plan
from .summaries import bradley_liberal, paired_difference, wilson_interval



def __getattr__(name):
    # matplotlib is imported only when a report is made (keeps `import simpower` and workers light)
    if name == "make_report":
        from .report import make_report

        return make_report
    raise AttributeError(f"module 'simpower' has no attribute {name!r}")


__all__ = [
    "__version__", "analytic",
    # scenario, running, results
    "Scenario", "load_scenario", "load_plan", "StudyPlan", "execute", "PlanResult", "Execution", "run", "run_many", "RunResult", "Records", "RunInterrupted", "RunStore", "open_store",
    # planning
    "sweep", "Grid", "Range", "null_check", "required_n", "detectable_effect", "SearchResult", "run_to_mcse",
    "run_many_to_mcse", "MemoryStore", "point_key", "make_report", "assurance", "required_n_for_assurance",
    "AssuranceResult",
    # contracts
    "Process", "Analysis", "Outcome", "Missingness", "Batch", "TestResult", "as_test_result", "BatchResult",
    "as_batch_result",
    # processes
    "NormalOneSample", "NormalPaired", "NormalTwoArm", "TwoArm", "MultiArm", "ClusterTrial", "RepeatedMeasures",
    "BinaryTwoArm", "CountTwoArm", "SurvivalTwoArm", "PilotResample", "PilotUnits",
    # outcomes and missingness
    "Normal", "Lognormal", "Gamma", "SkewNormal", "Fleishman", "StudentT", "ContaminatedNormal", "ScipyOutcome",
    "MCAR", "MAR", "MNAR", "Dropout",
    # analyses
    "ZTest", "TTest", "WelchT", "PairedT", "ClusterMeansT", "GEE", "FinalVisitT", "TwoProportions", "ChiSquare",
    "FisherExact", "Logistic", "PoissonGLM", "NegBinGLM", "LogRank", "Cox", "MannWhitney", "WilcoxonSignedRank",
    "PermutationTest", "BootstrapCI", "LogT", "TOST", "NonInferiority", "Multiple", "Dunnett", "AnovaF", "OLS", "Ancova", "MixedModel",
    "PosteriorProbability",
    # summaries
    "bradley_liberal", "paired_difference", "wilson_interval",
    # errors
    "SimpowerError", "ParameterError", "ScenarioFileError", "UnknownNameError", "RunError", "StoreError",
]
