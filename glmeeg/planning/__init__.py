"""Planning: power of one test from the noncentral t and F distributions (``analytic``), and the
power of a whole corrected design simulated from a saved result (``simulated``)."""

from .analytic import EEG_TYPICAL_N, PowerSolution, power_curve, solve_power
from .simulated import CRITERIA, DetectionRate, SimulatedPower, simulate_power

__all__ = ["PowerSolution", "solve_power", "power_curve", "EEG_TYPICAL_N", "CRITERIA",
           "DetectionRate", "SimulatedPower", "simulate_power"]
