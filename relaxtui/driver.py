"""The solve driver, kept at its first-release import path (it lives in :mod:`relaxtui.solver.driver`)."""

from relaxtui.solver.driver import Run, SolveResult, check_outputs, solve, write_outputs

__all__ = ["Run", "SolveResult", "check_outputs", "solve", "write_outputs"]
