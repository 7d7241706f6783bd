"""The validated problem: what a case file and its picture mean.

A :class:`Case` is produced by :func:`relaxtui.case.load_case` and consumed by
the operator assembly (``relaxtui.solver.assembled``), the reports and the UI. It holds
no numba objects and is cheap to build.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

# Region kinds, in the order of the contract's table. The integer of a kind is
# its position here; kernels receive these integers, never the strings.
KINDS = ("interior", "fixed", "outside", "flux", "convection")
INTERIOR, FIXED, OUTSIDE, FLUX, CONVECTION = range(5)
KIND_CODE = {name: i for i, name in enumerate(KINDS)}

# The methods a case's [solver] table, the command line and the UI accept.
# The registry with their set-up lives in relaxtui.solver.methods.
from relaxtui.options import DEFAULT_MAX_SWEEPS, DEFAULT_METHOD, DEFAULT_OMEGA, DEFAULT_TOLERANCE  # noqa: E402,F401 - one source


@dataclass(frozen=True)
class Region:
    """One declared colour of the picture and what it means.

    Parameters that do not apply to the kind are ``None``; ``conductivity`` of
    a fixed region is ``None`` unless the case gives one (then a face uses the
    neighbouring interior cell's conductivity alone).
    """

    name: str
    color: str  # "#rrggbb" lower case, or "transparent"
    kind: str  # one of KINDS
    conductivity: float | None = None  # interior: k (default 1.0); fixed: optional
    source: float = 0.0  # interior only: per unit volume, into the domain
    value: float | None = None  # fixed
    flux: float | None = None  # flux: per unit face area, into the domain
    coefficient: float | None = None  # convection: film coefficient
    ambient: float | None = None  # convection
    line: int | None = None  # line of the [[region]] header in the TOML file
    conductivity_y: float | None = None  # v1.1, interior: ky of an orthotropic region (conductivity is kx)

    @property
    def orthotropic(self) -> bool:
        return self.conductivity_y is not None

    @property
    def kind_code(self) -> int:
        return KIND_CODE[self.kind]


@dataclass(frozen=True)
class SolverDefaults:
    """The case's optional ``[solver]`` table; ``None`` where it is silent."""

    method: str | None = None
    omega: float | str | None = None  # a number in (0, 2) or "auto"
    tolerance: float | None = None
    max_sweeps: int | None = None
    precision: str | None = None  # "double" or "single" (case format v1.1)


@dataclass(eq=False)
class Case:
    """A loaded, validated case.

    ``codes[row, col]`` is the index into ``regions`` of the region the pixel
    belongs to, in image order (row 0 is the top of the picture).
    """

    path: Path | None
    mask_path: Path
    regions: tuple[Region, ...]
    codes: np.ndarray  # uint8, shape (rows, cols)
    cell_size: float = 1.0
    depth: float = 1.0
    snap: bool = False
    snapped: int = 0
    title: str | None = None
    quantity: str = "field"
    unit: str = ""
    solver: SolverDefaults = field(default_factory=SolverDefaults)
    # v1.1 (relaxtui.case.physics): contact resistances, probes, geometry, coefficient maps
    contacts: tuple = ()
    probes: tuple = ()
    geometry: str = "planar"
    maps: tuple = ()

    @property
    def per_face_physics(self) -> bool:
        """True when a v1.1 key changes the operator (contacts, orthotropy, maps, axisymmetry)."""
        return bool(self.contacts or self.maps or self.geometry != "planar"
                    or any(r.conductivity_y is not None for r in self.regions))

    @property
    def shape(self) -> tuple[int, int]:
        return (int(self.codes.shape[0]), int(self.codes.shape[1]))

    @property
    def name(self) -> str:
        """A short name for reports: the TOML file's stem, else the mask's."""
        return (self.path or self.mask_path).stem

    def kind_codes(self) -> np.ndarray:
        """Per-region kind integers (int8), index-aligned with ``regions``."""
        return np.array([r.kind_code for r in self.regions], dtype=np.int8)

    def region_counts(self) -> np.ndarray:
        """Number of cells of each region (int64), index-aligned with ``regions``."""
        return np.bincount(self.codes.ravel(), minlength=len(self.regions)).astype(np.int64)
