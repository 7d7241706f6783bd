"""The assembled operator: a case turned into arrays a kernel can sweep.

Design
------
The contract's operator is piecewise constant per region, so the normalised
equation of an interior cell P,

    u_P = wN uN + wS uS + wW uW + wE uE + q_P,   w_X = G_PX / D_P,  q_P = b_P / D_P,

(fixed neighbours, flux and convection faces and the source folded into q,
weight 0 for every neighbour that is not an unknown) is a function of the
5-tuple (region of P, regions of its 4 neighbours). Each distinct tuple is a
*class*; the operator stores

- ``cls``: one class code per cell (0 = not an unknown; uint8 while there
  are at most 255 other classes, else uint16/uint32), padded by one cell on
  every side;
- ``table``: (classes, 5) float64, the weights and q of each class; ``diag``: D;
- row *segments*: each padded row cut into bulk runs (one class over at
  least ``MIN_RUN`` cells: the sweep loads five scalars once and streams only
  the field) and mixed stretches (one table gather per cell), with runs of
  non-unknowns skipped.

A uniform case therefore pays for no per-cell conductances, diagonal or
right-hand side: a Jacobi sweep streams the field in and out (16 B per cell)
plus the class byte of mixed cells; the working set of a solve is the padded
field, the class array (1 B), the Jacobi buffer (8 B, Jacobi only) and the
exported copy. Memory per cell is counted by :meth:`Operator.memory_bytes`.

The working array is the field padded by one cell; cells that are not
unknowns hold finite values (fixed cells their value, others 0), so a weight-0
read of them is harmless and border cells need no bounds checks.

Assembly (:mod:`relaxtui.kernels.assemble`) is compiled and parallel: bulk
cells (all 5 regions equal) take their region's class at once; the others are
keyed, the distinct keys sorted, and each such cell finds its class by binary
search. Every 4-connected group of interior cells is checked for a fixed or
convection face by the loader's check (:func:`relaxtui.case.domain.check_anchored`).

Numba is imported only when an Operator is built.
"""

from __future__ import annotations

import math

import numpy as np

from relaxtui.case.domain import check_anchored
from relaxtui.case.model import CONVECTION, FIXED, FLUX, INTERIOR, Case
from relaxtui.errors import CaseError, UsageError
from relaxtui.solver.methods import METHODS

SWEEP_METHODS = tuple(name for name, m in METHODS.items() if m.kernel is not None)
MIN_RUN = 16  # shortest run of one class swept with constant weights
PARALLEL_CELLS = 1 << 16  # below this many cells a sweep runs on one thread (no parallel start-up)
FIELD_DTYPES = {"double": np.float64, "single": np.float32}  # the working array's storage by precision
FLOW_BLOCKS = 64  # row blocks of the flows kernel: fixed, so sums do not depend on the thread count


def _class_dtype(classes: int):
    if classes <= 1 << 8:
        return np.uint8
    if classes <= 1 << 16:
        return np.uint16
    return np.uint32


def summary_conductivities(kind, conductivity, fixed_conductivity) -> tuple[np.ndarray, np.ndarray]:
    """Per region, the conductivity the field summary's flux uses (interior: its own; fixed: its declared
    one, NaN without) and whether a fixed region inherits its interior neighbours' (uint8), for
    ``relaxtui.kernels.measure.field_summary``."""
    fixed = kind == FIXED
    cond = np.where(kind == INTERIOR, conductivity, np.where(fixed & (fixed_conductivity > 0.0), fixed_conductivity, np.nan))
    inherit = (fixed & ~(fixed_conductivity > 0.0)).astype(np.uint8)
    return cond, inherit


def combine_summary_blocks(blocks, row_offset: int = 0):
    """(minimum, maximum, peak) from ``field_summary``'s block rows, taken in order and kept only when strictly
    better (the first cell in row-major order wins a tie): (value, row, col) or None for each extreme,
    (value, qx, qy, row, col) or None for the peak; ``row_offset`` is added to the rows."""
    low = high = peak = None
    for row in blocks:
        if row[0]:
            if low is None or row[1] < low[0]:
                low = (float(row[1]), int(row[2]) + row_offset, int(row[3]))
            if high is None or row[4] > high[0]:
                high = (float(row[4]), int(row[5]) + row_offset, int(row[6]))
        if row[7] >= 0.0 and (peak is None or row[7] > peak[0]):
            peak = (float(row[7]), float(row[8]), float(row[9]), int(row[10]) + row_offset, int(row[11]))
    return low, high, peak


class Operator:
    """The assembled operator of a :class:`~relaxtui.case.model.Case` (see the module docstring).

    Parameters
    ----------
    case : Case
        A validated case; the operator re-checks what a kernel relies on
        (codes, kinds, parameter ranges, every group of interior cells
        anchored by a fixed or convection face) and raises
        :class:`~relaxtui.errors.CaseError` otherwise.

    Attributes
    ----------
    shape : (rows, cols)
    unknowns : int
        Number of interior cells.
    cells_streamed : int
        Cells a Jacobi or red-black sweep visits (the row segments); the
        lexicographic sweep visits the same unknowns. For Mcell/s.
    classes : int
        Number of classes, including class 0.
    """

    def __init__(self, case: Case):
        self.case = case
        codes = case.codes
        if not isinstance(codes, np.ndarray) or codes.ndim != 2 or codes.size == 0:
            raise CaseError("the case's code array must be a non-empty 2-D array")
        if codes.dtype != np.uint8:
            if codes.dtype.kind not in "iu" or codes.min() < 0 or codes.max() > 255:
                raise CaseError(f"the case's code array must be uint8 region indices, not {codes.dtype}")
            codes = codes.astype(np.uint8)
        self.codes = np.ascontiguousarray(codes)
        regions = case.regions
        if not regions:
            raise CaseError("the case declares no regions")
        if int(self.codes.max()) >= len(regions):
            raise CaseError(f"code {int(self.codes.max())} in the picture has no region (only {len(regions)} declared)")
        self.shape = (int(self.codes.shape[0]), int(self.codes.shape[1]))
        self.cell_size = _positive(case.cell_size, "cell_size")
        self.depth = _positive(case.depth, "depth")
        self._region_arrays(regions)

        from relaxtui.kernels import assemble

        check_anchored(self.codes, self.kind, str(case.path or case.mask_path))
        self.physics = None  # the v1.1 features (relaxtui.solver.assembly), None for a v1 case
        if getattr(case, "per_face_physics", False):
            from relaxtui.solver.assembly import Physics

            self.physics = Physics(self, case)
            self.physics.assemble(assemble)
        else:
            self._assemble(assemble)
        self._scratch = {}  # the sweep buffer per field type (float64, float32), made by the first sweep that needs it
        self._radius = None
        self._fingerprint = None
        # (norm of the inverse, how it was found): relaxtui.solver.conditioning fills it once per operator
        self.inverse_norm: tuple[float, str] | None = None

    # --- set-up ------------------------------------------------------------------------

    def _region_arrays(self, regions) -> None:
        n = len(regions)
        self.kind = np.array([r.kind_code for r in regions], dtype=np.int8)
        self.interior = (self.kind == INTERIOR).astype(np.uint8)
        self.conductivity = np.ones(n)
        self.fixed_conductivity = np.zeros(n)
        self.value = np.zeros(n)
        self.flux = np.zeros(n)
        self.coefficient = np.ones(n)
        self.ambient = np.zeros(n)
        self.source = np.zeros(n)
        for i, r in enumerate(regions):
            where = f"region {r.name!r}"
            if r.kind == "interior":
                if r.conductivity is not None:
                    self.conductivity[i] = _positive(r.conductivity, f"{where}: conductivity")
                self.source[i] = _finite(r.source, f"{where}: source")
            elif r.kind == "fixed":
                self.value[i] = _finite(r.value, f"{where}: value")
                if r.conductivity is not None:
                    self.fixed_conductivity[i] = _positive(r.conductivity, f"{where}: conductivity")
            elif r.kind == "flux":
                self.flux[i] = _finite(r.flux, f"{where}: flux")
            elif r.kind == "convection":
                self.coefficient[i] = _positive(r.coefficient, f"{where}: coefficient")
                self.ambient[i] = _finite(r.ambient, f"{where}: ambient")
            elif r.kind != "outside":
                raise CaseError(f"{where}: unknown kind {r.kind!r}")

    def _assemble(self, assemble) -> None:
        rows, cols = self.shape
        nreg = len(self.kind)
        border = nreg
        base = nreg + 1
        edge_keys, edge_counts, region_cells = assemble.edge_keys(self.codes, self.interior, border)
        # interior cells per region, minus the edge cells of that region, are its bulk cells
        edge_of_region = np.bincount(edge_keys // base**4, weights=edge_counts, minlength=nreg).astype(np.int64)
        bulk_cells = np.where(self.interior != 0, region_cells - edge_of_region, 0)
        bulk_regions = np.flatnonzero(bulk_cells > 0)
        bulk_class = np.zeros(nreg, dtype=np.int64)
        bulk_class[bulk_regions] = np.arange(1, len(bulk_regions) + 1)
        edge_base = 1 + len(bulk_regions)
        classes = edge_base + len(edge_keys)
        self.classes = classes
        self.cls = np.zeros((rows + 2, cols + 2), dtype=_class_dtype(classes))
        assemble.assign_classes(self.codes, self.interior, border, bulk_class, edge_keys, edge_base, self.cls)
        # every class's 5-tuple key (class 0: none), and its cell count
        self.class_keys = np.empty(classes, dtype=np.int64)
        self.class_keys[0] = -1
        self.class_keys[1:edge_base] = bulk_regions * (base**4 + base**3 + base**2 + base + 1)
        self.class_keys[edge_base:] = edge_keys
        self.class_cells = np.zeros(classes, dtype=np.int64)
        self.class_cells[1:edge_base] = bulk_cells[bulk_regions]
        self.class_cells[edge_base:] = edge_counts
        self.unknowns = int(self.class_cells.sum())
        self.region_cells = region_cells
        self.table = np.zeros((classes, 5))
        self.diag = np.zeros(classes)
        assemble.class_table(self.class_keys, border, self.kind, self.conductivity, self.fixed_conductivity, self.value,
                             self.flux, self.coefficient, self.ambient, self.source, self.cell_size, self.table, self.diag)
        if classes > 1 and not np.all(self.diag[1:] > 0):  # pragma: no cover - the anchoring check catches these first
            raise CaseError("an interior cell has neither a domain neighbour nor a convection face")
        self.row_ptr, self.seg_start, self.seg_end, self.seg_class = assemble.segments(self.cls, MIN_RUN)
        # classes with a fixed, flux or convection neighbour: the only cells the flows kernel visits
        self._boundary = np.zeros(classes, dtype=np.uint8)
        kinds_of = np.append(self.kind, np.int8(-1))  # the border index maps to "nothing"
        keys = self.class_keys[1:]
        for _ in range(4):
            self._boundary[1:] |= np.isin(kinds_of[keys % base], (FIXED, FLUX, CONVECTION))
            keys = keys // base
        self.cells_streamed = int((self.seg_end.astype(np.int64) - self.seg_start).sum())
        self._segments = (self.row_ptr, self.seg_start, self.seg_end, self.seg_class)

    # --- the working array -----------------------------------------------------------------

    @property
    def padded_shape(self) -> tuple[int, int]:
        return (self.shape[0] + 2, self.shape[1] + 2)

    def face_counts(self) -> np.ndarray:
        """Number of faces between interior cells and each region (int64, one entry per region)."""
        if self.physics is not None and self.physics.per_cell:
            return self.physics.face_counts()
        nreg = len(self.kind)
        base = nreg + 1
        out = np.zeros(nreg + 1, dtype=np.int64)
        keys = self.class_keys[1:]
        cells = self.class_cells[1:]
        for _ in range(4):
            np.add.at(out, keys % base, cells)
            keys = keys // base
        return out[:nreg]

    def default_guess(self) -> float:
        """The face-count-weighted mean of the fixed values and convection ambients (0 without such faces)."""
        faces = self.face_counts().astype(np.float64)
        weights = np.where(self.kind == FIXED, faces, 0.0) + np.where(self.kind == CONVECTION, faces, 0.0)
        values = np.where(self.kind == FIXED, self.value, self.ambient)
        total = weights.sum()
        return float((weights * values).sum() / total) if total > 0 else 0.0

    single_precision = True  # new_field(precision="single"): the relaxation sweeps take a float32 field

    def new_field(self, initial: np.ndarray | None = None, precision: str = "double") -> np.ndarray:
        """A new working array: fixed cells at their value, interior cells at ``initial`` or the default guess.

        Parameters
        ----------
        initial : ndarray (rows, cols), optional
            Real numbers; must be finite on interior cells (anything, NaN
            included, elsewhere).
        precision : "double" (float64, the default) or "single" (float32)
            The storage of the working array. Every method of this operator
            takes either: the kernels compute each update in float64 (the class
            table is float64) and round it to the field's type on store;
            residuals, flows and the exported field are float64.

        Returns
        -------
        ndarray (rows + 2, cols + 2) float64 (or float32), C-contiguous: the
        field padded by one cell; :meth:`view` gives the (rows, cols) part.
        """
        from relaxtui.kernels import measure

        if precision not in FIELD_DTYPES:
            raise UsageError(f"precision must be one of {', '.join(map(repr, FIELD_DTYPES))}, not {precision!r}")
        u = np.zeros(self.padded_shape, dtype=FIELD_DTYPES[precision])
        if initial is None:
            measure.init_field(self.codes, self.kind, self.value, np.zeros((1, 1)), False, self.default_guess(), u)
            return u
        values = initial_values(initial, self.shape)
        if measure.init_field(self.codes, self.kind, self.value, values, True, 0.0, u):
            row, col = measure.first_bad_initial(self.codes, self.kind, values)
            raise UsageError(f"the initial field is not finite at interior cell row {int(row)}, column {int(col)}")
        return u

    def view(self, u: np.ndarray) -> np.ndarray:
        """The (rows, cols) view of a working array (no copy)."""
        return u[1:-1, 1:-1]

    def _check_field(self, u, name: str = "field") -> None:
        if (not isinstance(u, np.ndarray) or u.shape != self.padded_shape or u.dtype not in (np.float64, np.float32)
                or not u.flags.c_contiguous):
            raise UsageError(f"the {name} must be a working array of this operator (from new_field)")

    # --- sweeps ------------------------------------------------------------------------------

    def sweep(self, u, method: str, omega: float, sweeps: int, updates: np.ndarray, residuals: np.ndarray) -> int:
        """Run ``sweeps`` sweeps of ``method`` on ``u`` in place.

        Parameters
        ----------
        u : working array (from :meth:`new_field`), modified in place.
        method : "jacobi" (weighted Jacobi, weight ``omega``), "gauss-seidel"
            (``omega`` must be 1), "sor" (lexicographic), "red-black-sor"
            (red-black ordering; omega 1 is red-black Gauss-Seidel).
        omega : float in (0, 2).
        sweeps : int >= 0.
        updates, residuals : float64 arrays of length >= ``sweeps``, written:
            per sweep, the largest |u_new - u_old| and the largest residual
            (field units; see :mod:`relaxtui.kernels.sweeps`).

        Returns
        -------
        int: sweeps done; fewer than asked when a sweep's largest update was
        not finite (the field then holds that sweep's result).
        """
        self._check_field(u)
        m = METHODS.get(method) if isinstance(method, str) else None
        if m is None or m.kernel is None:
            if m is not None:
                raise UsageError(f"{method!r} is not a relaxation sweep of the operator")
            raise UsageError(f"unknown method {method!r}; choose one of {', '.join(SWEEP_METHODS)}")
        try:
            omega = float(omega)
        except (TypeError, ValueError):
            raise UsageError(f"omega must be a number, not {omega!r}") from None
        # kernel-layer guards (the user-facing checks are relaxtui.options)
        if not (0.0 < omega < 2.0):
            raise UsageError(f"omega must lie in (0, 2), got {omega}")
        if not m.has_omega and omega != 1.0:
            raise UsageError(f"{method} takes omega = 1, got {omega} (use sor)")
        if isinstance(sweeps, bool) or not isinstance(sweeps, (int, np.integer)) or sweeps < 0:
            raise UsageError(f"sweeps must be a whole number >= 0, got {sweeps!r}")
        sweeps = int(sweeps)
        for name, arr in (("updates", updates), ("residuals", residuals)):
            if not isinstance(arr, np.ndarray) or arr.dtype != np.float64 or arr.ndim != 1 or arr.shape[0] < sweeps or not arr.flags.writeable:
                raise UsageError(f"{name} must be a writable 1-D float64 array of length >= {sweeps}")
        # sweeps == 0 still calls the kernel: a cheap way to load (or compile) it before a timed run
        import importlib

        spec = m.kernel
        module = importlib.import_module(f"relaxtui.kernels.{spec.module}")
        parallel, nblk = self._blocks()
        args = []
        for name in spec.inputs:
            if name == "u":
                args.append(u)
            elif name == "buffer":
                if u.dtype not in self._scratch and sweeps > 0:
                    self._scratch[u.dtype] = np.zeros(self.padded_shape, dtype=u.dtype)  # the field's type
                args.append(self._scratch.get(u.dtype, u))  # unused when sweeps == 0
            elif name == "segments":
                args.extend(self._segments)
            else:
                args.append(getattr(self, name))
        args += [omega, sweeps, updates, residuals]
        if parallel and spec.parallel is not None:
            return int(getattr(module, spec.parallel)(*args, nblk))
        return int(getattr(module, spec.serial)(*args))

    def _blocks(self) -> tuple[bool, int]:
        import numba

        threads = numba.get_num_threads()
        if threads < 2 or self.cells_streamed < PARALLEL_CELLS:
            return False, 1
        return True, max(1, min(threads, self.shape[0]))

    def release(self) -> None:
        """Drop the sweep buffers (made again by the next sweep that needs one)."""
        self._scratch = {}

    # --- measures ------------------------------------------------------------------------------

    def residual(self, u) -> float:
        """Largest |contract residual| over the interior cells (0.0 without unknowns), in field units."""
        self._check_field(u)
        from relaxtui.kernels import measure

        return float(measure.residual(u, self.cls, self.table, *self._segments, np.zeros((1, 1)), False, self._blocks()[1]))

    def residual_field(self, u) -> np.ndarray:
        """(rows, cols) float64: each interior cell's contract residual, NaN elsewhere."""
        self._check_field(u)
        from relaxtui.kernels import measure

        out = np.full(self.shape, np.nan)
        measure.residual(u, self.cls, self.table, *self._segments, out, True, self._blocks()[1])
        return out

    def flows(self, u) -> tuple[dict[str, float], float, float]:
        """Flows into the domain per fixed, flux and convection region, the source total and the imbalance.

        Per the contract's "Flows and balance": depth-scaled, positive into
        the domain, 0.0 for a declared region absent from the picture;
        imbalance = |sum of flows + source total| / (sum of |flows| + |source total|), 0 when that is 0.
        """
        self._check_field(u)
        if self.physics is not None:
            return self.physics.flows(u)
        from relaxtui.kernels import measure

        nblk = max(1, min(FLOW_BLOCKS, self.shape[0]))
        edge = self.codes[0]  # the whole picture: no neighbour rows above or below it (not read)
        acc = measure.flows(self.codes, edge, edge, False, False, u, self.cls, *self._segments, self._boundary, self.kind, self.conductivity,
                            self.fixed_conductivity, self.value, self.flux, self.coefficient, self.ambient, self.cell_size, nblk)
        per_region = acc.sum(axis=0) * self.depth
        return flow_balance(self.case.regions, per_region, region_source_total(self))

    def finish(self, u) -> np.ndarray:
        """The exported field: (rows, cols) C-contiguous float64 copy; interior and fixed cells hold values, others NaN."""
        self._check_field(u)
        from relaxtui.kernels import measure

        out = np.empty(self.shape)
        measure.export_field(self.codes, self.kind, self.value, u, out)
        return out

    def export_rows(self, u, a: int, b: int, out: np.ndarray | None = None) -> np.ndarray:
        """Rows a .. b - 1 of :meth:`finish`'s field (into ``out``, (b - a, cols) float64, when given):
        the exported field in strips, never whole."""
        rows, cols = self.shape
        if not 0 <= a <= b <= rows:
            raise UsageError(f"rows {a}..{b} are not within the field's {rows} rows")
        if out is None:
            out = np.empty((b - a, cols))
        elif out.shape != (b - a, cols) or out.dtype != np.float64 or not out.flags.c_contiguous:
            raise UsageError(f"export rows: out must be a C-contiguous float64 array of shape {(b - a, cols)}")
        if b > a:
            from relaxtui.kernels import measure

            measure.export_field(self.codes[a:b], self.kind, self.value, u[a : b + 2], out)
        return out

    def export_cells(self, u, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """:meth:`finish`'s values at the cells (rows, cols) (index arrays of one shape), float64."""
        codes = self.codes[rows, cols]
        kind = self.kind[codes]
        inner = np.asarray(u[rows + 1, cols + 1], dtype=np.float64)
        return np.where(kind == FIXED, self.value[codes], np.where(kind == INTERIOR, inner, np.nan))

    def field_summary(self, u):
        """The report's extremes and peak flux of :meth:`finish`'s field, read from the working array
        by one parallel pass (``relaxtui.kernels.measure.field_summary``): ``(extremes, flux_max)``
        with the keys of relaxtui.output.report.extremes and relaxtui.output.flux.peak_flux. None
        for a case whose flux needs per-cell coefficients (case format v1.1 contacts, orthotropy,
        maps, axisymmetry): the report then reads the export in strips."""
        self._check_field(u)
        if getattr(self.case, "per_face_physics", False):
            return None
        from relaxtui.kernels import measure
        from relaxtui.output.report import extremes_and_peak

        rows = self.shape[0]
        cond, inherit = summary_conductivities(self.kind, self.conductivity, self.fixed_conductivity)
        nblk = max(1, min(FLOW_BLOCKS, rows))
        blocks = measure.field_summary(self.codes, self.kind, self.value, cond, inherit, u, float(self.case.cell_size), nblk,
                                       0, rows, 1)
        low, high, peak = combine_summary_blocks(blocks)
        return extremes_and_peak(self.case, low, high, peak)

    def jacobi_apply(self, x, out) -> None:
        """out = J x for the homogeneous Jacobi iteration matrix J = D^-1 (D - A), in the working layout.

        ``x`` must be finite everywhere (zeros outside the unknowns will do);
        ``out`` is overwritten, 0 outside the unknowns. Safe to call from another
        thread while a sweep runs (it reads only the operator's arrays).
        """
        self._check_field(x, "vector x")
        self._check_field(out, "output")
        from relaxtui.kernels import measure

        out.fill(0.0)
        measure.jacobi_apply(x, out, self.cls, self.table, *self._segments, self._blocks()[1])

    def sqrt_diag(self) -> np.ndarray:
        """Per-cell sqrt(D) in the working layout, 0 outside the unknowns: D^(1/2) J D^(-1/2) is symmetric."""
        return np.sqrt(self.diag)[self.cls]

    # --- the Jacobi radius, estimated once per operator --------------------------------------

    def radius_job(self):
        """The :class:`~relaxtui.solver.radius.RadiusJob` of this operator (made on first use):
        every run on this operator shares one estimate of the Jacobi spectral radius."""
        if self._radius is None:
            from relaxtui.solver.radius import RadiusJob

            self._radius = RadiusJob(self)
        return self._radius

    def fingerprint(self) -> str:
        """A hash of what the operator's spectrum depends on (class codes, class table, diagonal), hex."""
        if self._fingerprint is None:
            import hashlib

            h = hashlib.blake2b(digest_size=20)
            for a in (np.asarray(self.shape, dtype=np.int64), self.cls, self.table, self.diag):
                h.update(str(a.dtype).encode())
                h.update(np.ascontiguousarray(a).data)
            self._fingerprint = h.hexdigest()
        return self._fingerprint

    def memory_bytes(self, method: str, precision: str = "double") -> int:
        """Bytes this operator and a solve with ``method`` hold: the operator's arrays, the working
        field, the method's sweep buffers (``Method.buffers``: Jacobi one) and the exported copy made by
        :meth:`finish`. ``precision="single"``: a relaxation method's field and buffers are float32
        (4 B per cell); the exported copy stays float64.

        Not counted: the case's own code array (owned by the case), and any
        hierarchy a multigrid solve builds on top of this operator.
        """
        m = METHODS.get(method) if isinstance(method, str) else None
        if m is None:
            raise UsageError(f"unknown method {method!r}")
        from relaxtui.solver.memory import field_bytes_per_cell

        field = field_bytes_per_cell(method, precision) * self.padded_shape[0] * self.padded_shape[1]
        held = self.cls.nbytes + self.table.nbytes + self.diag.nbytes + sum(a.nbytes for a in self._segments)
        held += self.class_keys.nbytes + self.class_cells.nbytes
        total = held + field + 8 * self.shape[0] * self.shape[1]
        total += m.buffers * field
        return int(total)


def initial_values(initial, shape) -> np.ndarray:
    """A starting field checked against the grid's ``shape`` (UsageError otherwise): C-contiguous float64."""
    if not isinstance(initial, np.ndarray):
        raise UsageError("the initial field must be a numpy array")
    if initial.shape != shape:
        raise UsageError(f"the initial field has shape {initial.shape}, the case's grid is {shape}")
    if initial.dtype.kind not in "fiu":
        raise UsageError(f"the initial field must hold real numbers, not {initial.dtype}")
    return np.ascontiguousarray(initial, dtype=np.float64)


def region_source_total(op) -> float:
    """The whole source of an operator whose regions have one source each: sum of depth s h² over their cells."""
    h2 = op.cell_size * op.cell_size
    return float(sum(op.depth * float(op.source[r]) * h2 * int(op.region_cells[r])
                     for r in np.flatnonzero((op.interior != 0) & (op.source != 0.0))))


def flow_balance(regions, per_region, source_total: float) -> tuple[dict[str, float], float, float]:
    """(flow of each fixed, flux or convection region by name, source total, imbalance) from the
    per-region flows: imbalance = |sum of flows + source| / (sum of |flows| + |source|), 0 when that is 0."""
    flows = {r.name: float(per_region[i]) for i, r in enumerate(regions) if r.kind in ("fixed", "flux", "convection")}
    total = sum(flows.values()) + source_total
    scale = sum(abs(v) for v in flows.values()) + abs(source_total)
    imbalance = abs(total) / scale if scale > 0 else 0.0
    return flows, source_total, float(imbalance)


def _finite(x, what: str) -> float:
    if isinstance(x, bool) or not isinstance(x, (int, float, np.integer, np.floating)) or not math.isfinite(float(x)):
        raise CaseError(f"{what} must be a finite number, got {x!r}")
    return float(x)


def _positive(x, what: str) -> float:
    v = _finite(x, what)
    if not v > 0:
        raise CaseError(f"{what} must be > 0, got {x!r}")
    return v
