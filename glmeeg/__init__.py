"""glmeeg: mass-univariate GLM statistics for epoched EEG.

Formula-driven single-trial regressions in every participant, group-level t and F maps at every
channel x time (x frequency) point, exact p-values, effect sizes and corrections for multiple
comparisons. Research software, not a clinical diagnostic device.
"""

__version__ = "0.1.0"

from .axes import Axes
from .errors import ContrastError, DesignFileError, FormulaError, GlmeegError, ModelError, StudyError
from .group_level import GroupStatistics, group_test
from .inference import Bonferroni, FalseDiscoveryRate, Holm, NoCorrection, adjust_p
from .power import PowerSolution, power_curve, solve_power
from .pipeline import AnalysisPlan, fit_subjects, plan_analysis, run_analysis, test_group
from .results import RunResult, TestResult, load_result, load_run, write_run
from .spec import DesignSpec, load_design
from .study import Study, read_study
from .robust import RobustFit, fit_robust
from .simulated_power import SimulatedPower, simulate_power
from .subject_level import OLSFit, fit_ols

__all__ = ["__version__", "Axes", "GlmeegError", "DesignFileError", "StudyError", "FormulaError",
           "ContrastError", "ModelError", "DesignSpec", "load_design", "Study", "read_study",
           "OLSFit", "fit_ols", "GroupStatistics", "group_test", "NoCorrection", "Bonferroni",
           "Holm", "FalseDiscoveryRate", "adjust_p", "AnalysisPlan", "plan_analysis",
           "fit_subjects", "test_group", "run_analysis", "TestResult", "RunResult",
           "load_result", "load_run", "write_run", "solve_power", "power_curve", "PowerSolution",
           "fit_robust", "RobustFit", "simulate_power", "SimulatedPower"]
