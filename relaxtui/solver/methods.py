"""The one registry of solution methods, read by the driver, the CLI and the UI.

Adding a method is one entry here (plus its kernel): its name, what ω means
for it, how "auto" picks ω from the Jacobi radius, its theoretical factor, and
the stepper that advances a field.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

from relaxtui.errors import UsageError
from relaxtui.solver import omega as young
from relaxtui.solver.methods_names import METHOD_NAMES


@dataclass(frozen=True)
class Method:
    name: str
    summary: str
    omega_meaning: str  # what ω is for this method ("" when it has none)
    needs_radius: bool  # whether "auto" needs an estimate of the Jacobi radius
    auto: Callable[[float], float]  # Jacobi radius -> the automatic ω
    factor: Callable[[float, float], float] | None  # (Jacobi radius, ω) -> theoretical factor
    parallel: bool
    make: Callable | None = None  # operator -> stepper; None: the operator's own relaxation sweep

    def check_omega(self, omega: float) -> float:
        omega = float(omega)
        if not 0.0 < omega < 2.0:
            raise UsageError(f"omega must lie in (0, 2), got {omega:g}")
        if not self.omega_meaning and omega != 1.0:
            raise UsageError(f"{self.name} has no relaxation factor (omega must be 1); use sor or red-black-sor for omega {omega:g}")
        return omega

    @property
    def uses_radius(self) -> bool:
        """Whether the Jacobi radius informs this method (auto ω or the stopping rule's prior)."""
        return self.factor is not None

    def make_stepper(self, operator):
        """An object with ``sweep(u, omega, sweeps, updates, residuals) -> int``.

        One "sweep" of a stepper is one iteration of the method (a relaxation
        sweep, or a multigrid cycle). A stepper may carry ``info`` (a dict
        shown by the UI and put in the report, e.g. a level hierarchy).
        """
        if self.make is not None:
            return self.make(operator)
        return _RelaxationStepper(operator, self.name)


class _RelaxationStepper:
    """Advances a field with one of the operator's relaxation sweeps."""

    info = None

    def __init__(self, operator, name: str):
        self.operator = operator
        self.name = name

    def sweep(self, u, omega, sweeps, updates, residuals) -> int:
        return self.operator.sweep(u, self.name, omega, sweeps, updates, residuals)


METHODS: dict[str, Method] = {
    "jacobi": Method(
        "jacobi",
        "weighted Jacobi, two buffers, parallel",
        "weight",
        needs_radius=False,
        auto=lambda mu: 1.0,  # on a 2-cyclic operator weight 1 is optimal (Saad, ch. 4)
        factor=young.jacobi_factor,
        parallel=True,
    ),
    "gauss-seidel": Method(
        "gauss-seidel",
        "lexicographic Gauss-Seidel, serial",
        "",
        needs_radius=False,
        auto=lambda mu: 1.0,
        factor=lambda mu, w: mu * mu,
        parallel=False,
    ),
    "sor": Method(
        "sor",
        "lexicographic successive over-relaxation, serial",
        "relaxation factor",
        needs_radius=True,
        auto=young.optimal_omega,
        factor=young.sor_factor,
        parallel=False,
    ),
    "red-black-sor": Method(
        "red-black-sor",
        "red-black SOR (omega 1: red-black Gauss-Seidel), parallel",
        "relaxation factor",
        needs_radius=True,
        auto=young.optimal_omega,
        factor=young.sor_factor,
        parallel=True,
    ),
    "multigrid": Method(
        "multigrid",
        "multigrid cycles: red-black smoothing, Galerkin 9-point coarse levels, parallel",
        "smoother's relaxation factor",
        needs_radius=False,
        auto=lambda mu: _multigrid().DEFAULT_OMEGA,
        factor=None,  # no Jacobi-radius estimate: the stopping rule measures the cycle's own factor
        parallel=True,
        make=lambda operator: _multigrid().MultigridStepper(operator),
    ),
}


def _multigrid():
    from relaxtui.solver import multigrid  # numba only when a multigrid stepper is made

    return multigrid


def get_method(name: str) -> Method:
    try:
        return METHODS[name]
    except KeyError:
        known = ", ".join(n for n in METHOD_NAMES if n in METHODS)
        raise UsageError(f"unknown method {name!r}; choose one of {known}") from None
