"""glmeeg: mass-univariate GLM statistics for epoched EEG.

Formula-driven single-trial regressions in every participant, group-level t and F maps at every
channel x time (x frequency) point, exact p-values, effect sizes and corrections for multiple
comparisons. Research software, not a clinical diagnostic device.
"""

from ._version import __version__

# The public names, imported on first use (PEP 562): `glmeeg --help` and the command line's
# start-up load only what the command needs, and an interrupt during start-up lands in the
# command line's own handler rather than in an import.
_PUBLIC = {
    "Axes": "axes", "GlmeegError": "errors", "DesignFileError": "errors", "StudyError": "errors",
    "FormulaError": "errors", "ContrastError": "errors", "ModelError": "errors",
    "GroupStatistics": "group_level", "group_test": "group_level",
    "Bonferroni": "inference", "FalseDiscoveryRate": "inference", "Holm": "inference",
    "NoCorrection": "inference", "adjust_p": "inference",
    "PowerSolution": "planning", "power_curve": "planning", "solve_power": "planning",
    "AnalysisPlan": "pipeline", "fit_subjects": "pipeline", "plan_analysis": "pipeline",
    "run_analysis": "pipeline", "test_group": "pipeline",
    "RunResult": "results", "TestResult": "results", "load_result": "results",
    "load_run": "results", "load_test_results": "results", "load_run_folder": "results",
    "write_run": "results",
    "DesignSpec": "spec", "load_design": "spec", "Study": "study", "read_study": "study",
    "RobustFit": "subject_level", "fit_robust": "subject_level", "SimulatedPower": "planning",
    "simulate_power": "planning", "OLSFit": "subject_level", "fit_ols": "subject_level",
}


def __getattr__(name: str):
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'glmeeg' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_PUBLIC))


__all__ = ["__version__", "Axes", "GlmeegError", "DesignFileError", "StudyError", "FormulaError",
           "ContrastError", "ModelError", "DesignSpec", "load_design", "Study", "read_study",
           "OLSFit", "fit_ols", "GroupStatistics", "group_test", "NoCorrection", "Bonferroni",
           "Holm", "FalseDiscoveryRate", "adjust_p", "AnalysisPlan", "plan_analysis",
           "fit_subjects", "test_group", "run_analysis", "TestResult", "RunResult",
           "load_result", "load_test_results", "load_run_folder", "load_run", "write_run", "solve_power", "power_curve", "PowerSolution",
           "fit_robust", "RobustFit", "simulate_power", "SimulatedPower"]
