"""The one registry of solution methods, read by the operator, the driver, the memory model,
the CLI and the UI. Importable without numpy (``relaxtui --help`` lists the names).

A method is one :class:`Method` entry in :data:`METHODS` plus its kernel:

* ``kernel``: how the operator dispatches one of its relaxation sweeps (a
  :class:`Kernel`: the module and function names in ``relaxtui.kernels`` and
  the operator arrays it takes), or ``make``: a factory of a :class:`Stepper`
  for methods that are not one relaxation sweep (multigrid);
* ``buffers``: extra field-sized float64 arrays the sweep needs (Jacobi: one),
  and ``bytes_per_cell``: any other memory per picture cell (the memory model);
* ``omega_meaning``: what ω is for it ("" when it has none: ω must be 1);
* ``auto`` and ``needs_radius``: how "auto" picks ω (from the Jacobi radius or not);
* ``factor``: the theoretical factor per sweep for (Jacobi radius, ω), the
  stopping rule's floor (None: measured only), and ``invert``: the radius
  implied by an observed factor (used to correct a low radius estimate);
* ``short``: the name in narrow tables.

See DEVELOPERS.md, "How to add a method", for a worked example.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Protocol, runtime_checkable

from relaxtui.errors import UsageError
from relaxtui.solver import young

MAX_CHUNK = 1000  # most sweeps the driver runs in one chunk (a stepper may ask for fewer)
CHUNK_SECONDS = 0.1  # target duration of one chunk of sweeps (checks cost ~0.5 ms a chunk)


@dataclass(frozen=True)
class Kernel:
    """How the operator calls a relaxation kernel of ``relaxtui.kernels.<module>``.

    The call is ``f(*inputs, omega, sweeps, updates, residuals[, nblk])`` where
    each input names an operator array: ``u`` (the working field), ``buffer``
    (a field-sized scratch array, see ``Method.buffers``), ``cls``, ``table``,
    ``segments`` (the four row-segment arrays). ``parallel`` (given ``nblk``
    row blocks last) is used on large grids with two or more threads, else
    ``serial``.
    """

    module: str
    serial: str
    parallel: str | None = None
    inputs: tuple[str, ...] = ("u", "cls", "table", "segments")


@runtime_checkable
class Stepper(Protocol):
    """What the driver calls on the object that advances a field.

    One "sweep" of a stepper is one iteration of the method (a relaxation
    sweep, or a multigrid cycle). :class:`BaseStepper` gives the defaults.
    """

    info: dict | None  # shown by the UI and put in the report (e.g. a level hierarchy)
    rule_options: dict  # keyword arguments for the stopping rule (rate window, envelope)
    max_chunk: int  # most iterations per chunk
    chunk_multiple: int  # chunks are a multiple of this many iterations when they can be

    def sweep(self, u, omega: float, sweeps: int, updates, residuals) -> int: ...

    def release(self) -> None: ...


class BaseStepper:
    """Defaults of the :class:`Stepper` protocol."""

    info = None
    rule_options: dict = {}
    max_chunk = MAX_CHUNK
    chunk_multiple = 1

    def release(self) -> None:
        """Drop buffers that are not needed once the run has ended."""


class RelaxationStepper(BaseStepper):
    """Advances a field with one of the operator's relaxation sweeps."""

    def __init__(self, operator, name: str):
        self.operator = operator
        self.name = name
        self.chunk_multiple = METHODS[name].chunk_multiple

    def sweep(self, u, omega, sweeps, updates, residuals) -> int:
        return self.operator.sweep(u, self.name, omega, sweeps, updates, residuals)

    def release(self) -> None:
        self.operator.release()


@dataclass(frozen=True)
class Method:
    name: str
    short: str  # name in narrow tables
    summary: str
    omega_meaning: str  # what ω is for this method ("" when it has none)
    needs_radius: bool  # whether "auto" needs an estimate of the Jacobi radius
    auto: Callable[[float], float]  # Jacobi radius -> the automatic ω
    factor: Callable[[float, float], float] | None  # (Jacobi radius, ω) -> theoretical factor
    parallel: bool
    kernel: Kernel | None = None  # the operator's relaxation sweep
    make: Callable | None = None  # operator -> Stepper, for methods that are not one relaxation sweep
    buffers: int = 0  # extra padded float64 fields the sweep keeps (Jacobi: old and new iterate)
    bytes_per_cell: int = 0  # other memory per picture cell (multigrid: its hierarchy)
    invert: Callable[[float, float], float] | None = None  # (observed factor, ω) -> implied Jacobi radius
    auto_note: str = ""  # how "auto" computes ω from the radius, for the report
    # sweeps that alternate between two buffers end an odd count with a copy back into the field
    # (a whole extra pass): the driver then makes its chunks even
    chunk_multiple: int = 1

    @property
    def has_omega(self) -> bool:
        return bool(self.omega_meaning)

    def check_omega(self, omega) -> float:
        """ω in (0, 2) that applies to this method (see :mod:`relaxtui.options`)."""
        from relaxtui.options import check_omega_for

        value = check_omega_for(self.name, omega)
        if value == "auto":
            raise UsageError("omega must be a number here, not 'auto'")
        return value

    @property
    def uses_radius(self) -> bool:
        """Whether the Jacobi radius informs this method (auto ω or the stopping rule's prior)."""
        return self.factor is not None or self.needs_radius

    def make_stepper(self, operator) -> Stepper:
        own = getattr(operator, "make_stepper", None)  # an operator split across MPI ranks may bring its own
        stepper = own(self.name) if own is not None else None
        if stepper is not None:
            return stepper
        if self.make is not None:
            return self.make(operator)
        return RelaxationStepper(operator, self.name)


def _multigrid():
    from relaxtui.solver import multigrid  # numba only when a multigrid stepper is made

    return multigrid


_SEGMENTED = ("u", "cls", "table", "segments")
# what both SOR orderings share: the meaning of ω, Young's automatic ω and factor (young.py)
_SOR = dict(omega_meaning="relaxation factor", needs_radius=True, auto=young.optimal_omega,
            auto_note="2/(1+sqrt(1-radius^2))", factor=young.sor_factor, invert=young.mu_from_sor_factor)

METHODS: dict[str, Method] = {
    "jacobi": Method(
        "jacobi", "jacobi",
        "weighted Jacobi, two buffers, parallel",
        "weight",
        needs_radius=False,
        auto=lambda mu: 1.0,  # on a 2-cyclic operator weight 1 is optimal (Saad, ch. 4)
        factor=young.jacobi_factor,
        parallel=True,
        kernel=Kernel("sweeps", "jacobi_serial", "jacobi", ("u", "buffer", "cls", "table", "segments")),
        buffers=1,
        chunk_multiple=2,
    ),
    "gauss-seidel": Method(
        "gauss-seidel", "g-seidel",
        "lexicographic Gauss-Seidel, serial",
        "",
        needs_radius=False,
        auto=lambda mu: 1.0,
        factor=lambda mu, w: mu * mu,
        parallel=False,
        kernel=Kernel("sweeps", "sor_lexicographic", None, ("u", "cls", "table")),
    ),
    "sor": Method(
        "sor", "sor",
        "lexicographic successive over-relaxation, serial",
        parallel=False,
        kernel=Kernel("sweeps", "sor_lexicographic", None, ("u", "cls", "table")),
        **_SOR,
    ),
    "red-black-sor": Method(
        "red-black-sor", "rb-sor",
        "red-black SOR (omega 1: red-black Gauss-Seidel), parallel",
        parallel=True,
        kernel=Kernel("sweeps", "sor_red_black_serial", "sor_red_black", _SEGMENTED),
        **_SOR,
    ),
    "multigrid": Method(
        "multigrid", "mgrid",
        "multigrid cycles: red-black smoothing, Galerkin 9-point coarse levels, parallel",
        "smoother's relaxation factor",
        needs_radius=False,
        auto=lambda mu: _multigrid().DEFAULT_OMEGA,
        factor=None,  # no Jacobi-radius estimate: the stopping rule measures the cycle's own factor
        parallel=True,
        make=lambda operator: _multigrid().MultigridStepper(operator),
        bytes_per_cell=38,  # held through the iterations: coarse levels 21.3 (stencils 13.3, corrections and right-hand sides 5.3, float32 weights 2.7), CG work field and direction 16 (tests/test_memory.py keeps it an upper bound)
    ),
    "symmetric-sor": Method(
        "symmetric-sor", "ssor",
        "symmetric SOR: a forward then a backward lexicographic sweep, serial",
        "relaxation factor",
        needs_radius=True,
        # Young's omega_1 for SSOR when rho(LU) <= 1/4, true for the 5-point Laplacian (Young 1971, ch. 15, from memory)
        auto=lambda mu: 2.0 / (1.0 + math.sqrt(2.0 * (1.0 - min(max(mu, 0.0), 1.0)))),
        auto_note="2/(1+sqrt(2(1-radius)))",
        factor=None,  # no exact closed form for a general operator: the rule measures the factor
        parallel=False,
        kernel=Kernel("ssor", "sor_symmetric", None, ("u", "buffer", "cls", "table")),
        buffers=1,  # each cell's value before the iteration: the update is exactly |u_k - u_(k-1)|
    ),
}

METHOD_NAMES: tuple[str, ...] = tuple(METHODS)
# methods whose ω is an over-relaxation factor picked from the Jacobi radius: what `relaxtui sweep --omega` scans
OMEGA_SCAN_METHODS: tuple[str, ...] = tuple(name for name, m in METHODS.items() if m.needs_radius and m.has_omega)


def get_method(name: str) -> Method:
    try:
        return METHODS[name]
    except (KeyError, TypeError):
        raise UsageError(f"unknown method {name!r}; choose one of {', '.join(METHOD_NAMES)}") from None
