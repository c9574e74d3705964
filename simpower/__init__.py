"""simpower: statistical power by Monte Carlo simulation, checked against closed forms.

Describe the data you expect (a process) and the analysis you plan, run it
thousands of times, and read power, type I error, bias and coverage with their
Monte Carlo error.
"""

# The public names are loaded on first use (PEP 562): ``import simpower`` costs almost nothing, and a
# worker process that unpickles a chunk (``simpower.engine.chunk.run_chunk`` and the scenario's
# components) imports only the modules that chunk uses, not the planning, report or command-line
# layers, nor every analysis and its libraries. ``_PUBLIC`` maps each module to the names it lends
# the package ("public=inner" where the module calls it otherwise); matplotlib, for one, is imported
# only when a report is made.

import importlib
import importlib.util

from ._version import __version__

_PUBLIC = {
    "analyses.base": "Analysis BatchResult TestResult as_batch_result as_test_result",
    "analyses.bayes": "PosteriorProbability",
    "analyses.binary": "ChiSquare FisherExact Logistic TwoProportions",
    "analyses.clustered": "GEE ClusterMeansT FinalVisitT",
    "analyses.counts": "NegBinGLM PoissonGLM",
    "analyses.equivalence": "TOST NonInferiority",
    "analyses.mixed": "MixedModel",
    "analyses.multiarm": "AnovaF Dunnett",
    "analyses.multiplicity": "Multiple",
    "analyses.nonparametric": "MannWhitney WilcoxonSignedRank",
    "analyses.regression": "OLS Ancova",
    "analyses.resampling": "BootstrapCI LogT PermutationTest",
    "analyses.survival": "Cox LogRank",
    "analyses.ttests": "PairedT TTest WelchT ZTest",
    "engine": "RunInterrupted run run_many",
    "engine.store": "RunStore open_store",
    "errors": "ParameterError RunError ScenarioFileError SimpowerError StoreError UnknownNameError",
    "processes.arms": "MultiArm TwoArm",
    "batch": "Batch",
    "processes.base": "Missingness Outcome Process",
    "processes.binary": "BinaryTwoArm",
    "processes.clusters": "ClusterTrial",
    "processes.counts": "CountTwoArm",
    "processes.dropout": "Dropout",
    "processes.missing": "MAR MCAR MNAR",
    "processes.normal": "NormalOneSample NormalPaired NormalTwoArm",
    "processes.outcomes": "ContaminatedNormal Fleishman Gamma Lognormal Normal ScipyOutcome SkewNormal StudentT",
    "processes.pilot": "PilotResample",
    "processes.pilot_units": "PilotUnits",
    "processes.repeated": "RepeatedMeasures",
    "processes.survival": "SurvivalTwoArm",
    "result": "Records RunResult",
    "planning.assurance": "AssuranceResult assurance required_n_for_assurance",
    "planning.search": "SearchResult detectable_effect required_n",
    "planning.sequential": "MemoryStore point_key run_many_to_mcse run_to_mcse",
    "planning.sweep": "Grid Range null_check sweep",
    "scenario": "Scenario",
    "scenario_files": "load_scenario=load",
    "execution": "Execution",
    "study": "PlanResult StudyPlan execute load_plan",
    "summaries": "bradley_liberal paired_difference wilson_interval",
    "report": "make_report",
}

#: public name -> (module, name in the module)
_WHERE = {public: (module, inner or public) for module, names in _PUBLIC.items()
          for public, _, inner in (item.partition("=") for item in names.split())}


def __getattr__(name):
    where = _WHERE.get(name)
    if where is not None:
        value = getattr(importlib.import_module(f"{__name__}.{where[0]}"), where[1])
    elif not name.startswith("_") and importlib.util.find_spec(f"{__name__}.{name}") is not None:
        value = importlib.import_module(f"{__name__}.{name}")  # a subpackage: simpower.analytic, simpower.engine
    else:
        raise AttributeError(f"module 'simpower' has no attribute {name!r}")
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))


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
