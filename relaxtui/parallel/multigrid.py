"""Multigrid across MPI ranks: the single-process method (relaxtui.solver.multigrid) by strips.

The preconditioned conjugate gradients and the symmetric W-cycle are those of
:class:`relaxtui.solver.multigrid.MultigridStepper`, with the same kernels;
only where the numbers live changes:

* **Fine and first coarse levels by strips.** Every rank holds, at each of
  the levels 0 .. K-1, its own rows (level l + 1 owns the coarse rows that
  sit on its level-l rows) plus a few ghost rows on each side. The smoothers
  (red-black SOR on level 0, four-colour SOR on coarse levels) update the
  rank's own rows one colour (or row parity) at a time and trade one edge
  row with each neighbour after each; restriction reads two ghost rows,
  prolongation one. Every cell sees the same values as in one process, so
  the cycle is the same cycle.
* **Set-up by strips, redundantly at the edges.** Each rank computes the
  Galerkin levels 1 .. K on a wider band of fine rows than it owns (a margin
  of ``MARGIN * 2**K`` rows on each side); a coarse row depends on a bounded
  band of finer rows, so rows far enough from the band's edges equal those of
  the whole-grid set-up, and the rank keeps only those. No operator is sent.
* **Agglomeration.** Level K is the first level whose cells number fewer
  than :data:`GATHER_CELLS` or on which some rank would own fewer than
  :data:`MIN_ROWS` rows (or the coarsest level of the hierarchy). Its
  operator rows are gathered once onto rank 0, which builds the remaining
  levels and the banded Cholesky factor as one process does. In each visit
  the ranks restrict their residual rows into level K, rank 0 gathers them,
  runs the single-process coarse cycle (``Hierarchy.cycle_coarse``) on its
  levels and sends every rank the coarse rows its prolongation reads.
* **Conjugate gradients.** Dot products are summed per rank and the partial
  sums gathered on every rank and added in rank order (the same number
  everywhere); largest updates and residuals are integer MAX reductions of
  their bit patterns.

The factor per iteration is therefore the single-process one to rounding
(sums in another order). ``RELAXTUI_MPI_GATHER_CELLS`` overrides
:data:`GATHER_CELLS` (for tests and measurements of deeper split hierarchies).
"""

from __future__ import annotations

import math
import os
import time
from types import SimpleNamespace

import numpy as np

from relaxtui.output.atomic import pause_for_tests
from relaxtui.parallel.comm import mpi, quiet_wait, wait_yielding

GATHER_CELLS = 1 << 16  # a level with fewer cells is gathered onto rank 0
MIN_ROWS = 8  # a level stays split while every rank owns at least this many of its rows
MARGIN = 14  # set-up band beyond the cycle's rows, in units of 2**K fine rows (coarse rows reach ~8 rows of error)
GHOST = 2  # cycle rows beyond the own rows, in units of 2**K fine rows
TAG_HALO_UP, TAG_HALO_DOWN, TAG_PLANES, TAG_TAGS, TAG_CORRECTION = 41, 42, 43, 44, 45


def gather_cells() -> int:
    text = os.environ.get("RELAXTUI_MPI_GATHER_CELLS", "")
    return int(text) if text.strip().isdigit() else GATHER_CELLS


def _up(x: int) -> int:
    return (x + 1) // 2


def split_depth(bounds, shape, cells_limit: int) -> int:
    """K: the first coarse level that is gathered (levels 1 .. K-1 stay split), by geometry alone."""
    rows, cols = shape
    owned = list(bounds)
    level = 0
    while True:
        rows, cols = _up(rows), _up(cols)
        owned = [(_up(a), _up(b)) for a, b in owned]
        level += 1
        if rows * cols < cells_limit or min(b - a for a, b in owned) < MIN_ROWS:
            return level


def bands(a: int, b: int, rows: int, depth: int, margin: int) -> tuple[int, int]:
    """Fine rows [s, t) of a strip [a, b) widened by ``margin * 2**depth`` rows, s a multiple of 2**depth."""
    unit = 1 << depth
    s = max(0, ((a - margin * unit) // unit) * unit)
    return s, min(rows, b + margin * unit)


def _chain(s: int, t: int, levels: int) -> list[tuple[int, int]]:
    """The rows [s_l, t_l) of levels 0 .. levels that a fine band [s, t) covers (s a multiple of 2**levels)."""
    out = [(s, t)]
    for _ in range(levels):
        s, t = out[-1]
        out.append((s // 2, _up(t)))
    return out


def _owned(a: int, b: int, levels: int) -> list[tuple[int, int]]:
    out = [(a, b)]
    for _ in range(levels):
        out.append((_up(out[-1][0]), _up(out[-1][1])))
    return out


def _next_level(A, tag, table, bulk: bool, nblk_of):
    """(P, A_next, tag_next, table_next): interpolation and Galerkin product of a 9-point level."""
    from relaxtui.kernels import multigrid as mg
    from relaxtui.solver.mgtables import bulk_table9

    rc, cc = _up(A.shape[1] - 2), _up(A.shape[2] - 2)
    P = np.zeros((8, rc + 2, cc + 2), dtype=mg.WEIGHT_DTYPE)  # as one process: float32 weights, float64 stencils
    mg.interpolation9(A, P, np.zeros((rc + 2, cc + 2), dtype=np.uint8), nblk_of(A.shape[1] - 2, A.shape[2] - 2))
    table = bulk_table9(table) if bulk else table
    Ac = np.zeros((5, rc + 2, cc + 2))
    tag_c = np.zeros((rc + 2, cc + 2), dtype=np.uint32)
    mg.galerkin9(A, P, tag, table, Ac, tag_c, nblk_of(rc, cc))
    return P, Ac, tag_c, table


def _nblk_of(rows: int, cols: int) -> int:
    from relaxtui.solver.multigrid import _nblk

    return _nblk(rows * cols, rows)


class _Coarse:
    """Rank 0's levels K, K+1, ... and the coarsest factor, in the shape ``Hierarchy.cycle_coarse`` reads."""

    def __init__(self, A, tag, table, bulk: bool, coarsest: int):
        from relaxtui.kernels import multigrid as mg
        from relaxtui.solver.multigrid import Level

        self.levels = [Level(A)]
        while self.levels[-1].unknowns > coarsest and self.levels[-1].shape != (1, 1):
            L = self.levels[-1]
            L.P, Ac, tag, table = _next_level(L.A, tag, table, bulk, _nblk_of)
            self.levels.append(Level(Ac))
        last = self.levels[-1]
        self.index, self.cells, self.bw = mg.band_order(last.A, last.shape[1] <= last.shape[0])
        self.L, self.ok = mg.band_factor(last.A, self.index, self.cells, self.bw)

    def cycle_coarse(self, l: int, omega: float, pre: int, post: int, gamma: int) -> None:
        """The single-process coarse cycle (``Hierarchy.cycle_coarse``) on these levels."""
        from relaxtui.solver.multigrid import Hierarchy

        Hierarchy.cycle_coarse(self, l, omega, pre, post, gamma)

    def cycle(self, omega: float, nu: int, gamma: int) -> None:
        self.cycle_coarse(0, omega, nu, nu, gamma)


class StripMultigrid:
    """One rank's share of the distributed multigrid (collective: every rank calls the same methods).

    Parameters
    ----------
    comm : the job's communicator.
    bounds : list of (a, b), the fine rows of every rank's strip.
    shape : (rows, cols) of the grid.
    wide : (cls rows [S, T) padded, S, T): the class codes of the set-up band (see :func:`bands`).
    strip : the rank's :class:`relaxtui.parallel.strip.Strip` (its field ``u`` is CG's iterate).
    per_cell : bool, the operator has one class per cell (no bulk shortcut, as in one process).
    """

    def __init__(self, comm, bounds, shape, wide, strip, *, per_cell: bool, cells_limit: int, coarsest: int,
                 nu: int, gamma: int, check: bool = True):
        from relaxtui.kernels import assemble
        from relaxtui.kernels import multigrid as mg
        from relaxtui.solver.assembled import MIN_RUN
        from relaxtui.solver.mgtables import bulk_table0, level0_tables
        from relaxtui.solver.multigrid import Level

        started = time.perf_counter()
        MPI = mpi()
        self.comm, self.rank, self.size = comm, comm.Get_rank(), comm.Get_size()
        self.up = self.rank - 1 if self.rank > 0 else MPI.PROC_NULL
        self.dn = self.rank + 1 if self.rank < self.size - 1 else MPI.PROC_NULL
        self.strip, self.nu, self.gamma = strip, int(nu), int(gamma)
        self.table, self.diag = strip.table, strip.diag
        rows, cols = shape
        self.bounds = [tuple(map(int, p)) for p in bounds]
        a, b = self.bounds[self.rank]
        depth = split_depth(self.bounds, shape, cells_limit)
        cls_w, S, T = wide
        bulk = not per_cell
        # --- set-up on the band [S, T): levels 1 .. depth (fewer if one is the coarsest) ------
        self.ptab, self.pflag = level0_tables(self.table)
        ns = SimpleNamespace(classes=self.table.shape[0], table=self.table, diag=self.diag, cls=cls_w)
        table = bulk_table0(ns, self.ptab, self.pflag) if bulk else np.zeros((self.table.shape[0], 5))
        band = _chain(S, T, depth)
        own = _owned(a, b, depth)
        rc, cc = _up(T - S), _up(cols)
        A = np.zeros((5, rc + 2, cc + 2))
        tag = np.zeros((rc + 2, cc + 2), dtype=np.uint32)
        mg.galerkin0(cls_w, self.table, self.diag, self.ptab, self.pflag, table, A, tag, _nblk_of(rc, cc))
        setup = [(A, tag, None)]  # level l at [l - 1]: (A, tag, P to the next level)
        self.unknowns = [int(comm.allreduce(int(np.count_nonzero(strip.cls[1:-1])), op=MPI.SUM))]
        K = 1
        from relaxtui.parallel import stop

        while True:
            if check:  # (not in the kernels' warm-up on a tiny grid)
                pause_for_tests("multigrid-levels")
            stop.agree(comm, raise_stopped=True)  # between levels: a stop signal ends the set-up on every rank
            A, tag, _ = setup[-1]
            lo, hi = own[K]
            mine = int(np.count_nonzero(A[0, lo - band[K][0] + 1 : hi - band[K][0] + 1, 1:-1] > 0.0))
            self.unknowns.append(int(comm.allreduce(mine, op=MPI.SUM)))
            if K == depth or self.unknowns[K] <= coarsest:
                break
            P, Ac, tag_c, table = _next_level(A, tag, table, bulk, _nblk_of)
            setup[-1] = (A, tag, P)
            setup.append((Ac, tag_c, None))
            K += 1
        self.K = K
        # --- the cycle's rows: own rows plus GHOST * 2**K fine rows each side ---------------------
        s0, t0 = bands(a, b, rows, K, GHOST)
        self.rng = _chain(s0, t0, K)  # cycle rows [s_l, t_l) per level
        self.own = own[: K + 1]
        self.all_own = [_owned(pa, pb, K) for pa, pb in self.bounds]
        off = s0 - S
        self.cls0 = np.ascontiguousarray(cls_w[off : off + t0 - s0 + 2])
        self.seg0 = assemble.segments(self.cls0, MIN_RUN)
        self.w0 = np.zeros(self.cls0.shape)
        self.nblk0 = _nblk_of(t0 - s0, cols)
        self.view = self.w0[a - s0 : b - s0 + 2]  # CG's layout: own rows and one halo row each side
        self.levels = [None]
        for l in range(1, K + 1):
            (sl, tl), Sl = self.rng[l], band[l][0]
            A, tag, P = setup[l - 1]
            L = Level(np.ascontiguousarray(A[:, sl - Sl : tl - Sl + 2]))
            if l < K:
                sn, tn = self.rng[l + 1]
                Sn = band[l + 1][0]
                L.P = np.ascontiguousarray(P[:, sn - Sn : tn - Sn + 2])
            self.levels.append(L)
        # --- level K's rows onto rank 0, which builds the rest -------------------------------
        AK, tagK, _ = setup[-1]
        lo, hi = own[K]
        SK = band[K][0]
        planes = np.ascontiguousarray(AK[:, lo - SK + 1 : hi - SK + 1])
        tags = np.ascontiguousarray(tagK[lo - SK + 1 : hi - SK + 1])
        del setup, AK, tagK, A, tag
        self.coarse = None
        if self.rank == 0:
            RK, CK = self._shape(K, shape)
            Ag = np.zeros((5, RK + 2, CK + 2))
            tg = np.zeros((RK + 2, CK + 2), dtype=np.uint32)
            for r in range(self.size):
                plo, phi = self.all_own[r][K]
                if phi <= plo:
                    continue
                if r == 0:
                    Ag[:, plo + 1 : phi + 1], tg[plo + 1 : phi + 1] = planes, tags
                else:
                    buf = np.empty((5, phi - plo, CK + 2))
                    comm.Recv(buf, source=r, tag=TAG_PLANES)
                    Ag[:, plo + 1 : phi + 1] = buf
                    comm.Recv(tg[plo + 1 : phi + 1], source=r, tag=TAG_TAGS)
            self.coarse = _Coarse(Ag, tg, table, bulk, coarsest)
            if check and not self.coarse.ok:  # pragma: no cover - P^T A P of a positive definite A is positive definite
                from relaxtui.errors import UsageError

                raise UsageError("multigrid: the coarsest operator is not positive definite")
            info = [(list(L.shape), int(L.unknowns)) for L in self.coarse.levels[1:]]
        else:
            if hi > lo:
                comm.Send(planes, dest=0, tag=TAG_PLANES)
                comm.Send(tags, dest=0, tag=TAG_TAGS)
            info = None
        info = comm.bcast(info, root=0)
        self.total_levels = K + len(info)  # coarse levels 1 .. total_levels
        self.shapes = [list(self._shape(l, shape)) for l in range(K + 1)] + [s for s, _ in info]
        self.unknowns += [u for _, u in info]
        self._gather_layout(K)
        self.p = np.zeros_like(strip.u)
        self.synced = False
        self.k = 0
        self.rz = 0.0
        self.setup_seconds = time.perf_counter() - started

    @staticmethod
    def _shape(level: int, shape) -> tuple[int, int]:
        rows, cols = shape
        for _ in range(level):
            rows, cols = _up(rows), _up(cols)
        return rows, cols

    def _gather_layout(self, K: int) -> None:
        """Counts and displacements of level K's gathered rows, and the rows each rank's prolongation reads."""
        CK = self.levels[K].A.shape[2]
        RK = self.shapes[K][0]
        self.counts = [max(0, hi - lo) * CK for lo, hi in (o[K] for o in self.all_own)]
        self.displs = [(o[K][0] + 1) * CK for o in self.all_own]
        # fine rows [lo, hi) of level K - 1 read coarse rows lo // 2 .. ceil(hi / 2) (clipped to the grid)
        self.reads = [(max(0, o[K - 1][0] // 2), min(RK, _up(o[K - 1][1]) + 1)) for o in self.all_own]

    def memory_bytes(self) -> int:
        total = self.w0.nbytes + self.cls0.nbytes + self.p.nbytes + sum(x.nbytes for x in self.seg0)
        for L in self.levels[1:]:
            total += L.A.nbytes + L.e.nbytes + L.f.nbytes + (L.P.nbytes if L.P is not None else 0)
        if self.coarse is not None:
            for L in self.coarse.levels:
                total += L.A.nbytes + L.e.nbytes + L.f.nbytes + (L.P.nbytes if L.P is not None else 0)
            total += self.coarse.L.nbytes + self.coarse.cells.nbytes + self.coarse.index.nbytes
        return int(total)

    # --- halo rows ---------------------------------------------------------------------------

    def exchange(self, arr, level: int, depth: int) -> None:
        """Trade ``depth`` edge rows of level ``level``'s array with both neighbours."""
        s = self.rng[level][0]
        lo, hi = self.own[level]
        o0, o1 = lo - s + 1, hi - s + 1
        c = self.comm
        reqs = []
        if self.rank > 0:
            reqs += [c.Irecv(arr[o0 - depth : o0], source=self.up, tag=TAG_HALO_DOWN),
                     c.Isend(arr[o0 : o0 + depth], dest=self.up, tag=TAG_HALO_UP)]
        if self.rank < self.size - 1:
            reqs += [c.Irecv(arr[o1 : o1 + depth], source=self.dn, tag=TAG_HALO_UP),
                     c.Isend(arr[o1 - depth : o1], dest=self.dn, tag=TAG_HALO_DOWN)]
        if reqs:
            self.strip.finish_exchange(reqs)

    def _own_rows(self, level: int) -> tuple[int, int]:
        s = self.rng[level][0]
        lo, hi = self.own[level]
        return lo - s + 1, hi - s + 1

    # --- smoothers -----------------------------------------------------------------------------

    def _red_black(self, omega: float, colours) -> None:
        from relaxtui.kernels import halo

        r0, r1 = self._own_rows(0)
        s0 = self.rng[0][0]
        for colour in colours:
            c = (colour + s0) & 1  # local padded row i is global padded row s0 + i
            if self.strip.threads > 1:
                halo.colour_range(self.w0, self.cls0, self.table, *self.seg0, omega, c, r0, r1, self.nblk0)
            else:
                halo.colour_range_serial(self.w0, self.cls0, self.table, *self.seg0, omega, c, r0, r1, self.strip.row_tmp)
            self.exchange(self.w0, 0, 1)

    def _four_colour(self, l: int, omega: float, reverse: bool) -> None:
        from relaxtui.kernels.mg_strips import smooth9_rows

        L = self.levels[l]
        r0, r1 = self._own_rows(l)
        fp = 1 if reverse else 0
        for _ in range(self.nu):
            for parity in ((1, 0) if reverse else (0, 1)):
                smooth9_rows(L.e, L.f, L.A, omega, self.rng[l][0], parity, fp, r0, r1, L.nblk)
                self.exchange(L.e, l, 1)

    # --- the cycle -------------------------------------------------------------------------------

    def _visits(self, l: int) -> int:
        """How often level l visits level l + 1 (as ``Hierarchy.cycle_coarse``: once into the coarsest)."""
        return self.gamma if l + 1 < self.total_levels else 1

    def _solve_gathered(self, omega: float, visits: int) -> None:
        """Level K: gather its right-hand side on rank 0, which cycles ``visits`` times; send back the rows read."""
        K = self.K
        L = self.levels[K]
        lo, hi = self._own_rows(K)
        MPI = mpi()
        c = self.comm
        if self.rank == 0:
            G = self.coarse.levels[0]
            req = c.Igatherv(L.f[lo:hi], [G.f.reshape(-1), self.counts, self.displs, MPI.DOUBLE], root=0)
            req.Wait()
            G.e.fill(0.0)
            for _ in range(visits):
                self.coarse.cycle(omega, self.nu, self.gamma)
            reqs = []
            for r in range(1, self.size):
                q0, q1 = self.reads[r]
                if q1 > q0:
                    reqs.append(c.Isend(G.e[q0 + 1 : q1 + 1], dest=r, tag=TAG_CORRECTION))
            q0, q1 = self.reads[0]
            s = self.rng[K][0]
            L.e[q0 - s + 1 : q1 - s + 1] = G.e[q0 + 1 : q1 + 1]
            for q in reqs:
                q.Wait()
        else:
            quiet_wait(c.Igatherv(L.f[lo:hi], None, root=0))
            q0, q1 = self.reads[self.rank]
            if q1 > q0:
                s = self.rng[K][0]
                quiet_wait(c.Irecv(L.e[q0 - s + 1 : q1 - s + 1], source=0, tag=TAG_CORRECTION))

    def _cycle(self, l: int, omega: float) -> None:
        """Level l (1 <= l < K) of the W-cycle: e_l ~ A_l^-1 f_l, e_l zero on entry."""
        from relaxtui.kernels import multigrid as mg

        L = self.levels[l]
        N = self.levels[l + 1]
        self._four_colour(l, omega, False)
        self.exchange(L.e, l, 2)
        mg.restrict9(L.e, L.f, L.A, L.P, N.f, L.nblk)
        self._coarser(l + 1, omega, self._visits(l))
        mg.prolong9(L.e, L.A, L.P, N.e, L.nblk)
        self.exchange(L.e, l, 1)
        self._four_colour(l, omega, True)

    def _coarser(self, l: int, omega: float, visits: int) -> None:
        """Level l's correction from its right-hand side (just restricted): ``visits`` cycles from zero."""
        from relaxtui.kernels import multigrid as mg

        N = self.levels[l]
        mg.zero_fill(N.e, N.nblk)
        if l == self.K:
            self._solve_gathered(omega, visits)
            return
        self.exchange(N.f, l, 1)
        for _ in range(visits):
            self._cycle(l, omega)

    def cycle_symmetric(self, omega: float) -> None:
        """The single-process ``MultigridStepper.cycle_symmetric`` on the work field, by strips."""
        from relaxtui.kernels import multigrid as mg
        from relaxtui.parallel.strip import BLACK, RED

        for _ in range(self.nu):
            self._red_black(omega, (RED, BLACK))
        self.exchange(self.w0, 0, 2)
        mg.restrict0(self.w0, self.cls0, self.table, self.diag, *self.seg0, self.ptab, self.pflag, self.levels[1].f,
                     self.nblk0)
        self._coarser(1, omega, 1)
        mg.prolong0(self.w0, self.cls0, self.table, self.ptab, self.pflag, self.levels[1].e, self.nblk0)
        self.exchange(self.w0, 0, 1)
        for _ in range(self.nu):
            self._red_black(omega, (BLACK, RED))

    # --- conjugate gradients -----------------------------------------------------------------

    def _sum(self, values) -> np.ndarray:
        """Partial sums of every rank added in rank order: the same numbers on every rank."""
        mine = np.asarray(values, dtype=np.float64)
        parts = np.empty((self.size, mine.size))
        wait_yielding([self.comm.Iallgather(mine, parts)])
        total = np.zeros(mine.size)
        for r in range(self.size):
            total += parts[r]
        return total

    def _max_bits(self, values) -> np.ndarray:
        MPI = mpi()
        bits = np.abs(np.asarray(values, dtype=np.float64)).view(np.int64).copy()
        out = np.empty_like(bits)
        wait_yielding([self.comm.Iallreduce(bits, out, op=MPI.MAX)])
        return out.view(np.float64)

    def iterate(self, omega: float, count: int) -> tuple[np.ndarray, np.ndarray, int]:
        """``count`` CG iterations; (largest updates, largest residuals, iterations done), the same on every rank."""
        from relaxtui.kernels import multigrid as mg
        from relaxtui.solver.multigrid import _exact_dot

        st = self.strip
        x, w, p = st.u, self.view, self.p
        if not self.synced:
            mg.copy_into(x, w, st.nblk)
            self.synced, self.k = True, 0
        upd, res = np.zeros(count), np.zeros(count)
        done = 0
        for it in range(count):
            self.cycle_symmetric(omega)  # w = x + B r(x)
            rz_l, res_l = mg.pcg_rz(x, w, st.cls, self.table, self.diag, *st.segments, st.nblk)
            rz = float(self._sum([rz_l])[0])
            # as one process (MultigridStepper._cg_step): beta only from dot products float64 holds to
            # full precision (a field near 1e-150 or below has subnormal or zero ones: CG restarts)
            beta = rz / self.rz if (self.k > 0 and _exact_dot(self.rz) and _exact_dot(rz)) else 0.0
            mg.fcg_direction(w, x, p, beta, st.nblk)
            pap_l, pr_l, _ = mg.fcg_dots(x, p, st.cls, self.table, self.diag, *st.segments, st.nblk)
            pap, pr = self._sum([pap_l, pr_l])
            scaled = False
            if not (_exact_dot(pap) and math.isfinite(pr)):
                # p . A p under- or overflowed: scale p (halo rows too) by the power of two that brings
                # the largest |p| over the ranks to magnitude 1 (exact; the line search is invariant
                # under it) and take the dot products again; CG restarts at the next step
                top = float(self._max_bits([float(np.max(np.abs(p)))])[0])
                if 0.0 < top < math.inf:
                    p *= 2.0 ** -math.frexp(top)[1]
                    pap_l, pr_l, _ = mg.fcg_dots(x, p, st.cls, self.table, self.diag, *st.segments, st.nblk)
                    pap, pr = self._sum([pap_l, pr_l])
                    scaled = True
            alpha = pr / pap if (pap > 0.0 and math.isfinite(pap)) else 0.0
            du_l = mg.fcg_update(x, p, alpha, w, st.nblk)
            du, r = self._max_bits([du_l, res_l])
            self.rz = 0.0 if scaled else rz
            self.k += 1
            upd[it], res[it] = du, r
            done = it + 1
            if not math.isfinite(du):
                break
        return upd, res, done

    def inverse_norm(self, omega: float) -> float | None:
        """``MultigridStepper.inverse_norm`` by strips: ``||(I - W)^-1||_inf`` from ``(I - W) w = 1``, the same on every rank."""
        from relaxtui.solver.multigrid import inverse_norm_found

        return self._solve_classes(np.ones(self.table.shape[0]), omega, inverse_norm_found)[0]

    def residual_bound(self, inv: float, omega: float) -> float | None:
        """``MultigridStepper.residual_bound`` by strips (the same on every rank): each class's largest
        residual over the ranks (one MAX reduction of the per-class maxima of each rank's own rows),
        then the same CG steps."""
        from relaxtui.kernels import measure
        from relaxtui.solver.multigrid import weighted_bound

        st = self.strip
        mine = np.zeros(self.table.shape[0])
        measure.class_residual_max(st.u, st.cls, self.table, mine)
        rho = self._max_bits(mine)  # NaN's bits beat every number's: a NaN anywhere stays NaN
        return weighted_bound(rho, inv, lambda rhs, decide: self._solve_classes(rhs, omega, decide))

    def _solve_classes(self, rhs, omega: float, decide):
        """``MultigridStepper._solve_classes`` by strips: the single-process steps (CG preconditioned by
        the symmetric cycle on ``(I - W) x = rhs[class]``, every fixed value 0, from zero; the iterate in
        an array of the call's own, the direction in CG's) with the same kernels on the same values, and
        the same decision after each step from the same numbers: per step the cycle's own exchanges plus
        three collectives, the partial sums of r . z and of (p . A p, p . r) gathered and added in rank
        order, and one MAX reduction of the largest residual and the iterate's largest value. The CG
        state is dropped: the next :meth:`iterate` restarts CG from its field."""
        from relaxtui.kernels import multigrid as mg
        from relaxtui.solver.multigrid import INVERSE_NORM_STEPS, _exact_dot

        st = self.strip
        nb = st.nblk
        x, w, p = np.zeros_like(self.p), self.view, self.p
        table = self.table
        system = table.copy()
        system[1:, 4] = rhs[1:]  # row 0 is no unknown's class
        self.synced, self.k, self.rz = False, 0, 0.0  # w and p are taken over
        found = None
        tops = []
        rho = math.inf
        try:
            self.table = system  # the cycle's level-0 kernels read this table (right-hand sides in column 4)
            mg.zero_fill(w, nb)
            mg.zero_fill(p, nb)
            rz_prev = 0.0
            for k in range(INVERSE_NORM_STEPS + 1):
                self.cycle_symmetric(omega)  # w = x + B r(x)
                rz_l, res_l = mg.pcg_rz(x, w, st.cls, system, self.diag, *st.segments, nb)
                rz = float(self._sum([rz_l])[0])
                rho, top = self._largest(res_l, x)
                if k > 0:
                    tops.append(top)
                found = decide(rho, tops)
                if found is not None or not math.isfinite(rho) or k == INVERSE_NORM_STEPS:
                    break
                beta = rz / rz_prev if (k > 0 and _exact_dot(rz_prev) and _exact_dot(rz)) else 0.0
                mg.fcg_direction(w, x, p, beta, nb)  # p = z + beta p
                pap_l, pr_l, _ = mg.fcg_dots(x, p, st.cls, system, self.diag, *st.segments, nb)
                pap, pr = self._sum([pap_l, pr_l])
                alpha = pr / pap if (pap > 0.0 and math.isfinite(pap)) else 0.0
                if alpha == 0.0:
                    break
                mg.fcg_update(x, p, alpha, w, nb)  # x += alpha p; w = x
                rz_prev = rz
        finally:
            self.table = table
            mg.zero_fill(self.p, nb)
        return found, rho, (tops[-1] if tops else 0.0)

    def _largest(self, du_l: float, x) -> tuple[float, float]:
        """(largest change over the ranks, largest value of x over the ranks' own rows): one collective."""
        MPI = mpi()
        top = float(np.max(x[1:-1]))
        # NaN as infinity: MAX of a NaN depends on the operands' order, and every rank must decide alike
        mine = np.array([math.inf if math.isnan(du_l) else abs(du_l), math.inf if math.isnan(top) else top])
        out = np.empty(2)
        wait_yielding([self.comm.Iallreduce(mine, out, op=MPI.MAX)])
        return float(out[0]), float(out[1])


def warm(strip, threads: int) -> None:
    """Load (or compile) every kernel of the distributed multigrid: a 24 x 24 grid of one class on this rank alone."""
    from relaxtui.kernels import assemble
    from relaxtui.solver.assembled import MIN_RUN

    MPI = mpi()
    n = 24
    cls = np.zeros((n + 2, n + 2), dtype=strip.cls.dtype)
    cls[1:-1, 1:-1] = 1 if strip.table.shape[0] > 1 else 0
    tiny = SimpleNamespace(u=np.zeros((n + 2, n + 2)), cls=cls, segments=assemble.segments(cls, MIN_RUN), table=strip.table,
                           diag=strip.diag, nblk=1, threads=threads, row_tmp=np.empty(n + 2),
                           finish_exchange=strip.finish_exchange)
    with np.errstate(all="ignore"):
        mg = StripMultigrid(MPI.COMM_SELF, [(0, n)], (n, n), (cls, 0, n), tiny, per_cell=False, cells_limit=16,
                            coarsest=16, nu=1, gamma=2, check=False)
        mg.iterate(1.0, 1)


class DistributedMultigrid:
    """Rank 0's multigrid stepper over a :class:`relaxtui.parallel.group.DistributedOperator`.

    The interface of :class:`relaxtui.solver.multigrid.MultigridStepper` (``sweep``,
    ``release``, ``info``, ``rule_options``, ``max_chunk``, ``chunk_multiple``); every call is one
    collective command to the other ranks.
    """

    def __init__(self, operator):
        from relaxtui.solver.multigrid import MultigridStepper

        self.operator = operator
        self.rule_options = dict(MultigridStepper.rule_options)
        self.max_chunk = MultigridStepper.max_chunk
        self.chunk_multiple = MultigridStepper.chunk_multiple
        self.info = None
        self._build()

    def _build(self) -> None:
        from relaxtui.parallel.group import MG_SETUP
        from relaxtui.solver.multigrid import GAMMA, KRYLOV_SWEEPS, MultigridStepper

        from relaxtui.parallel import stop

        op = self.operator
        if stop.agreed():
            return  # the ranks have agreed to stop: the run is cancelled before its first iteration
        try:
            with op.group.collective(MG_SETUP):
                mg = op.strip.multigrid_setup()
        except stop.Stopped:  # on every rank at once: no hierarchy (the report has no method_info)
            op.group.busy = False
            op.strip.mg = None
            return
        levels = [{"shape": list(s), "unknowns": int(u)} for s, u in zip(mg.shapes, mg.unknowns)]
        shim = SimpleNamespace(operator=SimpleNamespace(unknowns=op.unknowns), direct=False, gamma=GAMMA, krylov=True,
                               krylov_sweeps=KRYLOV_SWEEPS,
                               h=SimpleNamespace(levels=[SimpleNamespace(unknowns=lv["unknowns"]) for lv in levels[1:]]))
        text = MultigridStepper.describe(shim)
        ranks = op.group.comm.Get_size()
        split = f"levels 0-{mg.K - 1} split by rows over {ranks} MPI ranks, level {mg.K} and below on rank 0"
        self.info = {"levels": levels, "setup_seconds": round(mg.setup_seconds, 6), "cycle": f"{text}; {split}",
                     "memory_bytes": mg.memory_bytes()}

    def sweep(self, u, omega, sweeps, updates, residuals) -> int:
        from relaxtui.parallel.group import MG_SWEEP, sweep_arguments

        op = self.operator
        op._check_field(u)
        omega, sweeps = sweep_arguments(omega, sweeps)
        if sweeps == 0:  # the kernels were loaded at set-up
            return 0
        if op.strip.mg is None:
            self._build()
        with op.group.collective(MG_SWEEP, omega, sweeps):
            upd, res, done = op.strip.mg.iterate(omega, sweeps)
        updates[:done] = upd[:done]
        residuals[:done] = res[:done]
        return done

    def inverse_norm(self, omega: float | None = None) -> float | None:
        """``||(I - W)^-1||_inf`` solved for with the distributed hierarchy (one collective command), as
        :meth:`relaxtui.solver.multigrid.MultigridStepper.inverse_norm`; None after :meth:`release`."""
        from relaxtui.parallel.group import MG_NORM
        from relaxtui.solver.multigrid import DEFAULT_OMEGA

        op = self.operator
        if op.strip.mg is None or op.unknowns == 0:
            return None
        omega = DEFAULT_OMEGA if omega is None else float(omega)
        with op.group.collective(MG_NORM, omega):
            return op.strip.mg.inverse_norm(omega)

    def residual_bound(self, u, inv: float, omega: float | None = None) -> float | None:
        """:meth:`relaxtui.solver.multigrid.MultigridStepper.residual_bound` on the distributed field (one
        collective command; ``u`` is rank 0's view, the ranks read their own strips); None after :meth:`release`."""
        from relaxtui.parallel.group import MG_BOUND
        from relaxtui.solver.multigrid import DEFAULT_OMEGA

        op = self.operator
        if op.strip.mg is None or op.unknowns == 0:
            return None
        omega = DEFAULT_OMEGA if omega is None else float(omega)
        with op.group.collective(MG_BOUND, omega, float(inv)):
            return op.strip.mg.residual_bound(float(inv), omega)

    def release(self) -> None:
        from relaxtui.parallel.group import MG_RELEASE

        op = self.operator
        if op.strip.mg is not None:
            with op.group.collective(MG_RELEASE):
                op.strip.mg = None
