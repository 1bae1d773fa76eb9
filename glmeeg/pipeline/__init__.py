"""The whole analysis of a design file, stage by stage: plan, fit subjects, test at group level.

:func:`plan_analysis` reads everything and builds every design and contrast without touching the
EEG data beyond the array headers, so every input error surfaces before any fitting
(``plan``). :func:`fit_subjects` streams the subjects one at a time (``subjects``);
:func:`test_group` runs one test (``tests``); :func:`run_analysis` chains them (``run``). The
command line is a thin layer over these functions.
"""

from .plan import AnalysisPlan, TestPlan, plan_analysis
from .run import check_assumptions, run_analysis
from .subjects import SubjectEstimates, check_memory, fit_subjects, subject_jobs
from .tests import test_group

__all__ = ["TestPlan", "AnalysisPlan", "SubjectEstimates", "plan_analysis", "fit_subjects",
           "test_group", "run_analysis", "check_assumptions", "check_memory", "subject_jobs"]
