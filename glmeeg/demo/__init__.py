"""The demo: a study of alarm urgency at a maritime training centre (invented data), with the
truth planted in it, and the verdict of an analysis held against that truth.

``study`` writes the study (:func:`write_demo_study`, :data:`DEMO_TRUTH`, :data:`DEMO_DESIGN`),
``folder`` keeps the demo's own files apart from a user's, ``verdict`` says what was found.
"""

from .folder import check_demo_folder
from .study import DEMO_DESIGN, DEMO_TRUTH, DemoTruth, PlantedEffect, write_demo_study
from .verdict import demo_verdict

__all__ = ["DEMO_DESIGN", "DEMO_TRUTH", "DemoTruth", "PlantedEffect", "check_demo_folder",
           "write_demo_study", "demo_verdict"]
