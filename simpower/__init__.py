"""simpower: statistical power by Monte Carlo simulation, checked against closed forms.

Describe the data you expect (a process) and the analysis you plan, run it
thousands of times, and read power, type I error, bias and coverage with their
Monte Carlo error.
"""

__version__ = "0.1.0"

from . import analytic
from .analyses.base import Analysis, TestResult, as_test_result
from .analyses.ttests import PairedT, TTest, WelchT, ZTest
from .engine import RunInterrupted, run, run_many
from .errors import ParameterError, RunError, ScenarioFileError, SimpowerError, StoreError, UnknownNameError
from .processes.base import Batch, Process
from .processes.normal import NormalOneSample, NormalPaired, NormalTwoArm
from .result import Records, RunResult
from .scenario import Scenario
from .summaries import bradley_liberal, paired_difference, wilson_interval

__all__ = [
    "__version__", "analytic", "Analysis", "TestResult", "as_test_result", "PairedT", "TTest", "WelchT", "ZTest",
    "RunInterrupted", "run", "run_many", "ParameterError", "RunError", "ScenarioFileError", "SimpowerError",
    "StoreError", "UnknownNameError", "Batch", "Process", "NormalOneSample", "NormalPaired", "NormalTwoArm",
    "Records", "RunResult", "Scenario", "bradley_liberal", "paired_difference", "wilson_interval",
]
