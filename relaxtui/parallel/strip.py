"""One rank's strip of the grid and the collective operations on it.

Every rank, rank 0 included, holds a :class:`Strip`: its rows a..b-1 of the
picture in the operator's working layout (n + 2 rows: halo, own rows, halo),
the class array of those rows, the row segments built from it, and the
field. The methods are *collective*: all ranks call the same method with the
same arguments (rank 0 tells the others which, see
:mod:`relaxtui.parallel.group`), and results that are global (largest update,
residual, flows, the exported field) arrive on rank 0.

Halo exchange: after a rank updates its first and last own rows it posts
their sends and the receives of its halo rows (nonblocking), updates the
inner rows, then waits; for red-black SOR this happens once per colour. The
neighbours of the first and last strips are ``MPI.PROC_NULL``: their halo rows
stay the zero padding of the single-process layout.
"""

from __future__ import annotations

import math
import time

import numpy as np

from relaxtui.parallel.comm import mpi, wait_yielding

TAG_UP, TAG_DOWN = 11, 12  # rows travelling to the rank above / below
RED, BLACK = 0, 1
INTERIOR, FIXED = 0, 1  # kind codes (relaxtui.case.model)


def split_rows(weights: np.ndarray, parts: int) -> list[tuple[int, int]]:
    """Cut rows 0..len(weights)-1 into ``parts`` consecutive strips of about equal total weight.

    Every strip gets at least one row; cut k is the row boundary where the
    running sum comes nearest to k/parts of the total. Needs
    ``len(weights) >= parts``.
    """
    rows = len(weights)
    if rows < parts:
        raise ValueError(f"{rows} rows cannot be cut into {parts} strips")
    total = float(np.sum(weights))
    csum = np.cumsum(weights, dtype=np.float64)
    cuts = [0]
    for k in range(1, parts):
        if total > 0:
            target = total * k / parts
            i = int(np.searchsorted(csum, target, side="left"))  # csum[i] is the first sum >= target
            before = csum[i - 1] if i > 0 else 0.0
            c = i + 1 if csum[min(i, rows - 1)] - target < target - before else i  # the nearer of the two cuts
        else:
            c = rows * k // parts
        c = max(c, cuts[-1] + 1)  # at least one row for the strip before
        c = min(c, rows - (parts - k))  # and one for each strip after
        cuts.append(c)
    cuts.append(rows)
    return [(cuts[k], cuts[k + 1]) for k in range(parts)]


class Strip:
    """One rank's strip (see the module docstring).

    Parameters
    ----------
    comm : the job's communicator.
    part : dict
        From :func:`relaxtui.parallel.group.make_parts`: ``a``, ``b``,
        ``rows``, ``cols``, ``cls`` (n + 2, cols + 2), ``codes`` (n, cols),
        ``up_codes``/``dn_codes`` (cols,) or None, the class ``table`` and
        ``diag``, the per-region arrays and the boundary-class flags.
    """

    def __init__(self, comm, part: dict, threads: int):
        from relaxtui.kernels import assemble
        from relaxtui.solver.assembled import MIN_RUN

        MPI = mpi()
        self.comm = comm
        self.rank = comm.Get_rank()
        self.size = comm.Get_size()
        self.a, self.b = int(part["a"]), int(part["b"])
        self.n = self.b - self.a
        self.rows, self.cols = int(part["rows"]), int(part["cols"])
        self.cls = part["cls"]
        self.codes = part["codes"]
        self.up_codes = part["up_codes"] if part["up_codes"] is not None else np.zeros(self.cols, np.uint8)
        self.dn_codes = part["dn_codes"] if part["dn_codes"] is not None else np.zeros(self.cols, np.uint8)
        self.has_up, self.has_dn = part["up_codes"] is not None, part["dn_codes"] is not None
        for key in ("table", "diag", "kind", "value", "conductivity", "fixed_conductivity", "flux", "coefficient",
                    "ambient", "boundary"):
            setattr(self, key, part[key])
        self.cell_size = float(part["cell_size"])
        self.regions = part["regions"]
        self.bounds = part.get("bounds")
        self.per_cell = bool(part.get("per_cell", False))
        self.wide = part.get("wide")  # (class codes of the multigrid set-up band, S, T) or None
        self.gather_cells = part.get("gather_cells")  # multigrid: levels with fewer cells are gathered on rank 0
        self.mg = None  # the rank's share of a distributed multigrid (relaxtui.parallel.multigrid)
        self._mg_warm = False
        self.segments = assemble.segments(self.cls, MIN_RUN)
        self.up = self.rank - 1 if self.rank > 0 else MPI.PROC_NULL
        self.dn = self.rank + 1 if self.rank < self.size - 1 else MPI.PROC_NULL
        self.threads = threads
        self.nblk = max(1, min(threads, self.n)) if threads > 1 else 1
        self.u = np.zeros((self.n + 2, self.cols + 2))
        self.tmp = None
        self.row_tmp = np.empty(self.cols + 2)
        # time in MPI during sweeps (halo waits, reductions), for the benchmarks
        self.halo_seconds = 0.0
        self.reduce_seconds = 0.0
        self.exchanges = 0
        self.reductions = 0

    # --- halo exchange ------------------------------------------------------------------

    def post(self, arr) -> list:
        """Start the exchange of ``arr``'s edge rows with the neighbours (receives into its halo rows)."""
        c = self.comm
        n = self.n
        return [c.Irecv(arr[0], source=self.up, tag=TAG_DOWN), c.Irecv(arr[n + 1], source=self.dn, tag=TAG_UP),
                c.Isend(arr[1], dest=self.up, tag=TAG_UP), c.Isend(arr[n], dest=self.dn, tag=TAG_DOWN)]

    def finish_exchange(self, requests) -> None:
        t0 = time.perf_counter()
        wait_yielding(requests)
        self.halo_seconds += time.perf_counter() - t0
        self.exchanges += 1

    def exchange(self, arr) -> None:
        self.finish_exchange(self.post(arr))

    # --- reductions (results on rank 0) ------------------------------------------------------

    def reduce_max_bits(self, bits: np.ndarray) -> np.ndarray | None:
        """Elementwise MAX over the ranks of int64 bit patterns of non-negative doubles (NaN wins)."""
        MPI = mpi()
        t0 = time.perf_counter()
        out = np.empty_like(bits) if self.rank == 0 else None
        wait_yielding([self.comm.Ireduce(bits, out, op=MPI.MAX, root=0)])
        self.reduce_seconds += time.perf_counter() - t0
        self.reductions += 1
        return out

    def reduce_sum(self, values: np.ndarray) -> np.ndarray | None:
        MPI = mpi()
        out = np.empty_like(values) if self.rank == 0 else None
        wait_yielding([self.comm.Ireduce(values, out, op=MPI.SUM, root=0)])
        return out

    def all_sum(self, value: float) -> float:
        """The sum over the ranks of ``value``, the same number on every rank (reduced on 0, then broadcast)."""
        MPI = mpi()
        buf = np.array([value], dtype=np.float64)
        out = np.empty(1)
        wait_yielding([self.comm.Ireduce(buf, out, op=MPI.SUM, root=0)])
        wait_yielding([self.comm.Ibcast(out, root=0)])
        return float(out[0])

    # --- the field ------------------------------------------------------------------------

    def new_field(self, initial: np.ndarray | None, guess: float) -> None:
        """Fixed cells at their value, interior cells at ``initial`` (this strip's rows) or ``guess``; halos exchanged."""
        from relaxtui.kernels import measure

        self.u.fill(0.0)
        if initial is None:
            measure.init_field(self.codes, self.kind, self.value, np.zeros((1, 1)), False, float(guess), self.u)
        else:
            measure.init_field(self.codes, self.kind, self.value, initial, True, float(guess), self.u)
        self.exchange(self.u)

    def sweep(self, method: str, omega: float, sweeps: int) -> tuple[np.ndarray, np.ndarray] | None:
        """``sweeps`` sweeps of ``method`` ("jacobi" or "red-black-sor") on this strip, halos kept current.

        Returns, on rank 0, the per-sweep largest update and residual over all
        ranks as int64 bit patterns (None on the other ranks).
        """
        upd = np.zeros(sweeps, dtype=np.int64)
        res = np.zeros(sweeps, dtype=np.int64)
        if sweeps > 0:
            if method == "jacobi":
                self._jacobi(omega, sweeps, upd, res)
            else:
                self._red_black(omega, sweeps, upd)
        out = self.reduce_max_bits(np.concatenate([upd, res]))
        if out is None:
            return None
        return out[:sweeps], out[sweeps:]

    def _jacobi(self, omega, sweeps, upd, res) -> None:
        from relaxtui.kernels import halo

        if self.tmp is None:
            self.tmp = np.zeros_like(self.u)
        n = self.n
        segs = self.segments
        par = self.threads > 1
        src, dst = self.u, self.tmp
        for it in range(sweeps):
            mu, mr = halo.jacobi_range_serial(src, dst, self.cls, self.table, *segs, omega, 1, 2)
            if n > 1:
                m2, r2 = halo.jacobi_range_serial(src, dst, self.cls, self.table, *segs, omega, n, n + 1)
                mu, mr = max(mu, m2), max(mr, r2)
            reqs = self.post(dst)
            if n > 2:
                if par:
                    m3, r3 = halo.jacobi_range(src, dst, self.cls, self.table, *segs, omega, 2, n, self.nblk)
                else:
                    m3, r3 = halo.jacobi_range_serial(src, dst, self.cls, self.table, *segs, omega, 2, n)
                mu, mr = max(mu, m3), max(mr, r3)
            self.finish_exchange(reqs)
            upd[it] = mu
            res[it] = mr
            src, dst = dst, src
        if sweeps % 2 == 1:
            halo.copy_segments(self.tmp, self.u, segs[0], segs[1], segs[2], 1, n + 1)

    def _red_black(self, omega, sweeps, upd) -> None:
        from relaxtui.kernels import halo

        n = self.n
        u = self.u
        segs = self.segments
        par = self.threads > 1
        for it in range(sweeps):
            mu = 0
            for colour in (RED, BLACK):
                c = (colour + self.a) & 1  # local row i is global padded row a + i
                mu = max(mu, halo.colour_range_serial(u, self.cls, self.table, *segs, omega, c, 1, 2, self.row_tmp))
                if n > 1:
                    mu = max(mu, halo.colour_range_serial(u, self.cls, self.table, *segs, omega, c, n, n + 1, self.row_tmp))
                reqs = self.post(u)
                if n > 2:
                    if par:
                        mu = max(mu, halo.colour_range(u, self.cls, self.table, *segs, omega, c, 2, n, self.nblk))
                    else:
                        mu = max(mu, halo.colour_range_serial(u, self.cls, self.table, *segs, omega, c, 2, n, self.row_tmp))
                self.finish_exchange(reqs)
            upd[it] = mu

    # --- measures (results on rank 0) ------------------------------------------------------

    def residual(self) -> float | None:
        from relaxtui.kernels import measure

        r = measure.residual(self.u, self.cls, self.table, *self.segments, np.zeros((1, 1)), False, self.nblk)
        out = self.reduce_max_bits(np.array([r]).view(np.int64))
        return None if out is None else float(out.view(np.float64)[0])

    def field_scale(self) -> float | None:
        """Largest |u| over the interior and fixed cells of all strips, on rank 0 (None elsewhere); 0.0 when
        no strip has such a cell (the caller, which knows the whole grid's region counts, decides then)."""
        own = self.u[1:-1]  # the working array holds 0 in every other cell of the strip's rows
        hi, lo = float(own.max()), float(own.min())
        if math.isfinite(hi) and math.isfinite(lo):
            local = max(hi, -lo, 0.0)
        else:  # non-finite cells outside the domain: look at the domain only (as the driver does)
            kinds = self.kind[self.codes]
            vals = own[:, 1:-1][(kinds == INTERIOR) | (kinds == FIXED)]
            local = float(np.max(np.abs(vals))) if vals.size else 0.0
        out = self.reduce_max_bits(np.array([local]).view(np.int64))
        return None if out is None else float(out.view(np.float64)[0])

    def flows(self) -> np.ndarray | None:
        """Per region, the flow into the domain through its faces summed over all strips (no depth factor)."""
        from relaxtui.kernels import measure

        nblk = max(1, min(64, self.n))
        acc = measure.flows(self.codes, self.up_codes, self.dn_codes, self.has_up, self.has_dn, self.u, self.cls,
                            *self.segments, self.boundary, self.kind, self.conductivity, self.fixed_conductivity,
                            self.value, self.flux, self.coefficient, self.ambient, self.cell_size, nblk)
        return self.reduce_sum(np.ascontiguousarray(acc.sum(axis=0)))

    def cells_at(self, rows: np.ndarray | None, cols: np.ndarray | None) -> np.ndarray | None:
        """The field at grid cells (rows, cols) given on rank 0 (broadcast), each read by the rank owning
        its row and summed on rank 0 (the others add 0.0: the owner's value exactly); None elsewhere."""
        rows, cols = self.comm.bcast((rows, cols), root=0)
        mine = (rows >= self.a) & (rows < self.b)
        vals = np.zeros(rows.shape)
        vals[mine] = self.u[rows[mine] - self.a + 1, cols[mine] + 1]
        return self.reduce_sum(vals)

    def summary(self, regions, cell_size: float):
        """Extremes and peak flux of the exported field, by strips (a case without the v1.1 per-face physics).

        Each rank trades the working array's edge rows with its neighbours
        (the flux of an edge row reads the row beyond it) and runs the
        single-process kernel (``relaxtui.kernels.measure.field_summary``) on
        its own rows, with the neighbours' edge rows and their class codes
        beside them: the same differences of the same numbers as on the whole
        grid. Rank 0 then picks the smallest and largest value and the largest
        flux magnitude, the first in row-major order on a tie (as the
        single-process :meth:`~relaxtui.solver.assembled.Operator.field_summary` does).

        Returns on rank 0 ``(minimum, maximum, peak)``: (value, row, col) or
        None for each extreme, and (value, qx, qy, row, col) or None for the
        peak flux; None on the other ranks.
        """
        from relaxtui.kernels import measure
        from relaxtui.solver.assembled import FLOW_BLOCKS, combine_summary_blocks, summary_conductivities

        n, cols = self.n, self.cols
        self.exchange(self.u)  # the neighbours' edge rows of the field as it stands
        codes = np.empty((n + 2, cols), dtype=self.codes.dtype)
        codes[0], codes[1 : n + 1], codes[n + 1] = self.up_codes, self.codes, self.dn_codes
        first = 0 if self.has_up else 1  # codes row first + i sits at u row first + i: du = first
        bottom = n + 2 if self.has_dn else n + 1
        cond, inherit = summary_conductivities(self.kind, self.conductivity, self.fixed_conductivity)
        blocks = measure.field_summary(codes[first:bottom], self.kind, self.value, cond, inherit, self.u, float(cell_size),
                                       max(1, min(FLOW_BLOCKS, n)), 1 - first, 1 - first + n, first)
        low, high, peak = combine_summary_blocks(blocks, self.a - (1 - first))
        found = self.comm.gather((low, high, peak), root=0)
        if self.rank != 0:
            return None
        lows = [f[0] for f in found if f[0] is not None]
        highs = [f[1] for f in found if f[1] is not None]
        peaks = [f[2] for f in found if f[2] is not None]
        low = min(lows, key=lambda t: (t[0], t[1], t[2])) if lows else None
        high = min(highs, key=lambda t: (-t[0], t[1], t[2])) if highs else None
        peak = min(peaks, key=lambda t: (-t[0], t[3], t[4])) if peaks else None
        return low, high, peak

    def export(self, out: np.ndarray | None, bounds) -> None:
        """The exported field (NaN outside the domain) gathered on rank 0 into ``out`` (rows, cols)."""
        from relaxtui.kernels import measure

        if self.rank == 0:
            measure.export_field(self.codes, self.kind, self.value, self.u, out[self.a : self.b])
            for r in range(1, self.size):
                a, b = bounds[r]
                self.comm.Recv(out[a:b], source=r, tag=21)
        else:
            mine = np.empty((self.n, self.cols))
            measure.export_field(self.codes, self.kind, self.value, self.u, mine)
            self.comm.Send(mine, dest=0, tag=21)

    # --- the Jacobi radius -----------------------------------------------------------------

    def lanczos_begin(self) -> float:
        """Start Lanczos on the Jacobi matrix in the D-inner product, vectors split by strips.

        The iteration of :class:`relaxtui.solver.radius.Lanczos` (start vector
        1 on the unknowns, three-term recurrence); the inner products of a
        step are summed over the ranks on rank 0 and broadcast, so every rank
        sees the same numbers. Returns the start vector's D-norm (0: no unknowns).
        """
        from relaxtui.kernels import spectral

        cls = self.cls[1:-1]
        v = np.zeros(self.u.shape)
        spectral.start_vector(cls, self.diag, v[1:-1])
        norm = math.sqrt(self.all_sum(spectral.d_dot(v[1:-1], v[1:-1], cls, self.diag)))
        self.lanczos = None
        if norm > 0.0:
            spectral.scale_into(v[1:-1], 1.0 / norm, v[1:-1])
            self.lanczos = {"v": v, "v_prev": np.zeros_like(v), "w": np.zeros_like(v), "beta": 0.0}
        return norm

    def lanczos_advance(self, decide=None) -> None:
        """Lanczos steps until rank 0 says stop.

        After each step rank 0 calls ``decide(alpha, beta_new) -> (go_on,
        done)`` (it keeps the tridiagonal matrix and the stopping rule) and
        broadcasts the answer with the new beta; the other ranks only keep
        the recurrence going. When done, the vectors are dropped.
        """
        from relaxtui.kernels import measure, spectral

        state = self.lanczos
        cls = self.cls[1:-1]
        msg = np.zeros(3)
        while True:
            v, v_prev, w = state["v"], state["v_prev"], state["w"]
            self.exchange(v)
            w.fill(0.0)
            measure.jacobi_apply(v, w, self.cls, self.table, *self.segments, self.nblk)
            alpha = self.all_sum(spectral.d_dot(w[1:-1], v[1:-1], cls, self.diag))
            part = spectral.d_orthogonalise(w[1:-1], v[1:-1], alpha, v_prev[1:-1], state["beta"], cls, self.diag)
            square = self.reduce_sum(np.array([part * part]))
            if self.rank == 0:  # the new beta and the decision travel in one broadcast
                beta_new = math.sqrt(float(square[0]))
                go_on, done = decide(alpha, beta_new)
                msg[:] = (float(go_on), float(done), beta_new)
            wait_yielding([self.comm.Ibcast(msg, root=0)])
            go_on, done, beta_new = bool(msg[0]), bool(msg[1]), float(msg[2])
            if done:
                self.lanczos = None
                return
            state["beta"] = beta_new
            state["v_prev"], state["v"] = v, v_prev
            spectral.scale_into(w[1:-1], 1.0 / beta_new, state["v"][1:-1])
            if not go_on:
                return

    # --- multigrid ---------------------------------------------------------------------------

    def multigrid_setup(self):
        """Build this rank's share of the distributed multigrid (collective; kernels loaded rank 0 first)."""
        from relaxtui.parallel import multigrid as pm
        from relaxtui.parallel.group import warm_in_turn
        from relaxtui.solver.multigrid import COARSEST_UNKNOWNS, GAMMA, KRYLOV_SWEEPS

        if not self._mg_warm:
            warm_in_turn(self.comm, lambda: pm.warm(self, self.threads), pause="multigrid-warm")
            self._mg_warm = True
        self.mg = pm.StripMultigrid(self.comm, self.bounds, (self.rows, self.cols), self.wide, self,
                                    per_cell=self.per_cell, cells_limit=self.gather_cells, coarsest=COARSEST_UNKNOWNS,
                                    nu=KRYLOV_SWEEPS, gamma=GAMMA)
        return self.mg

    # --- compile once --------------------------------------------------------------------------

    def warm(self) -> None:
        """Load (or compile) every kernel this strip's solve calls, on empty ranges: for Jacobi and red-black
        SOR their sweeps and the Jacobi radius's Lanczos; for multigrid (whose own kernels
        :func:`relaxtui.parallel.multigrid.warm` loads) the measurements only (loading a kernel from the
        cache costs 15-20 ms; multigrid never calls the other eleven). A stop signal skips the rest
        (:func:`relaxtui.parallel.stop.point` between the kernels; see :func:`~relaxtui.parallel.group.warm_in_turn`)."""
        from relaxtui.kernels import halo, measure, spectral
        from relaxtui.parallel.stop import point

        u, cls, segs = self.u, self.cls, self.segments
        relaxation = self.wide is None  # a multigrid strip has its set-up band
        if relaxation:
            halo.jacobi_range(u, u, cls, self.table, *segs, 1.0, 1, 1, 1)
            halo.jacobi_range_serial(u, u, cls, self.table, *segs, 1.0, 1, 1)
            halo.colour_range(u, cls, self.table, *segs, 1.0, 0, 1, 1, 1)
            halo.colour_range_serial(u, cls, self.table, *segs, 1.0, 0, 1, 1, self.row_tmp)
            halo.copy_segments(u, u, segs[0], segs[1], segs[2], 1, 1)
        halo.largest_bits(np.zeros(1), 0)
        point()  # a stop signal skips the rest
        measure.flows(self.codes[:0], self.up_codes, self.dn_codes, False, False, u, cls, *segs, self.boundary,
                      self.kind, self.conductivity, self.fixed_conductivity, self.value, self.flux, self.coefficient,
                      self.ambient, self.cell_size, 1)
        measure.residual(u[:2], cls[:2], self.table, *segs, np.zeros((1, 1)), False, 1)
        point()  # a stop signal skips the rest
        measure.export_field(self.codes[:0], self.kind, self.value, u, np.empty((0, self.cols)))
        cond, inherit = np.zeros(self.kind.shape), np.zeros(self.kind.shape, dtype=np.uint8)
        measure.field_summary(self.codes[:0], self.kind, self.value, cond, inherit, u, 1.0, 1, 0, 0, 1)
        measure.init_field(self.codes[:0], self.kind, self.value, np.zeros((1, 1)), False, 0.0, u)
        if relaxation:
            measure.jacobi_apply(u[:2], u[:2], cls[:2], self.table, *segs, 1)
            point()  # a stop signal skips the rest
            spectral.start_vector(cls[:0], self.diag, u[:0])
            spectral.d_dot(u[:0], u[:0], cls[:0], self.diag)
            spectral.d_orthogonalise(u[:0], u[:0], 0.0, u[:0], 0.0, cls[:0], self.diag)
            spectral.scale_into(u[:0], 1.0, u[:0])
            spectral.tridiagonal_extreme(np.zeros(1), np.zeros(1), 1)
