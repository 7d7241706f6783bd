"""Multigrid for relaxtui: conjugate gradients preconditioned by one symmetric multigrid W-cycle.

One CG iteration is one "sweep" of the driver (:class:`MultigridStepper`); its update is the
exact change of the field, |alpha p|, which the stopping rule turns into its bound. Levels keep
every other cell in each direction; interpolation follows the collapsed-stencil rule of
black-box multigrid (Dendy 1982), with cells that would get no weight aggregated into their
block; coarse operators are Galerkin products P^T A P, 9-point on every level (kernels in
:mod:`relaxtui.kernels.multigrid`); the coarsest level (at most ``COARSEST_UNKNOWNS`` unknowns)
is solved by banded Cholesky. The finest level is smoothed by the project's red-black SOR
kernel (backward, black then red, after the correction), coarse levels by four-colour SOR.
The design, the alternatives and their measurements: docs/design/multigrid.md
(``benchmarks/multigrid.py`` regenerates them).
"""

from __future__ import annotations

import math
import time

import numpy as np

from relaxtui.errors import UsageError
from relaxtui.solver.mgtables import BULK_PATCH, bulk_table0, bulk_table9, level0_tables  # noqa: F401 - re-exported

DEFAULT_OMEGA = 1.2
GAMMA = 2  # W-cycles below level 1
KRYLOV = True  # conjugate gradients around the cycle
KRYLOV_SWEEPS = 2  # sweeps before and after the coarse correction in the symmetric cycle
PRE_SWEEPS = 2
POST_SWEEPS = 1
COARSEST_UNKNOWNS = 2048  # a coarse level this small is solved directly (banded Cholesky)
DIRECT_UNKNOWNS = 64  # a problem this small is solved directly on its own grid
PARALLEL_CELLS = 1 << 14
WARM_GRID = 160  # cells square of the problem the kernels of a big one are loaded on (streamed in parallel)
WARM_COARSEST = 16  # its coarsest level: every coarse kernel runs
WARM_SMALL_FROM = 1 << 20  # streamed cells from which a problem is warmed up on the small one
# the norm of the inverse solved for with the hierarchy (MultigridStepper.inverse_norm): most CG steps, and the
# largest residual of (I - W) w = 1 it stops at (the bound is then within 1 % of the norm)
INVERSE_NORM_STEPS = 500
INVERSE_NORM_RESIDUAL = 5e-3
INVERSE_NORM_WINDOW = 25  # steps over which max w must have settled when the residual cannot fall (see inverse_norm_found)
INVERSE_NORM_SETTLE = 1e-2
RESIDUAL_BOUND_SLACK = 0.05  # the weighted residual bound stops once inv * (its residual) is this share of it


def _threads() -> int:
    import numba

    return max(1, int(numba.get_num_threads()))


def _nblk(cells: int, rows: int) -> int:
    threads = _threads()
    if threads < 2 or cells < PARALLEL_CELLS:
        return 1
    return max(1, min(threads, rows))


class Level:
    """A coarse level: stencil planes A (5, R + 2, C + 2), correction e, right-hand side f (the smoother
    divides by the centre plane: no plane of inverses),
    and (unless coarsest) interpolation planes P (8, Rc + 2, Cc + 2) to the next level, stored in
    ``relaxtui.kernels.multigrid.WEIGHT_DTYPE`` (float32; every product with them is float64)."""

    def __init__(self, A: np.ndarray):
        self.A = A
        self.shape = (A.shape[1] - 2, A.shape[2] - 2)
        self.unknowns = int(np.count_nonzero(A[0] > 0.0))
        self.e = np.zeros(A.shape[1:])
        self.f = np.zeros(A.shape[1:])
        self.P = None
        self.nblk = _nblk(self.shape[0] * self.shape[1], self.shape[0])


def _coarse_shape(shape):
    return ((shape[0] + 1) // 2, (shape[1] + 1) // 2)


class Hierarchy:
    """The coarse levels of an operator (see the module docstring) and the coarse part of a cycle.

    Parameters
    ----------
    operator : relaxtui.solver.assembled.Operator
    coarsest : int
        A level with at most this many unknowns is the coarsest and is solved
        directly (banded Cholesky).
    bulk : bool
        Use the bulk-stencil shortcut in the Galerkin products (identical
        results; off only for tests that check the shortcut).

    Attributes
    ----------
    levels : list of Level
        Levels 1, 2, ... (level 0 is the operator itself); empty when the
        problem is small enough to be solved directly on its own grid.
    setup_seconds : float
    """

    def __init__(self, operator, coarsest: int = COARSEST_UNKNOWNS, bulk: bool = True):
        from relaxtui.kernels import multigrid as mg

        t0 = time.perf_counter()
        self.operator = operator
        self.ptab, self.pflag = level0_tables(operator.table)
        rows, cols = operator.shape
        self.nblk0 = _nblk(rows * cols, rows)
        self.levels: list[Level] = []
        if operator.unknowns > min(coarsest, DIRECT_UNKNOWNS) and (rows > 1 or cols > 1):
            table = bulk_table0(operator, self.ptab, self.pflag) if bulk else np.zeros((operator.classes, 5))
            rc, cc = _coarse_shape(operator.shape)
            A = np.zeros((5, rc + 2, cc + 2))
            tag = np.zeros((rc + 2, cc + 2), dtype=np.uint32)
            mg.galerkin0(operator.cls, operator.table, operator.diag, self.ptab, self.pflag, table, A, tag, _nblk(rc * cc, rc))
            self.levels.append(Level(A))
            while True:
                L = self.levels[-1]
                if L.unknowns <= coarsest or L.shape == (1, 1):
                    break
                rc, cc = _coarse_shape(L.shape)
                P = np.zeros((8, rc + 2, cc + 2), dtype=mg.WEIGHT_DTYPE)  # float32: stencils stay float64
                lost = np.zeros((rc + 2, cc + 2), dtype=np.uint8)
                mg.interpolation9(L.A, P, lost, L.nblk)
                table = bulk_table9(table) if bulk else table
                A = np.zeros((5, rc + 2, cc + 2))
                tag_c = np.zeros((rc + 2, cc + 2), dtype=np.uint32)
                mg.galerkin9(L.A, P, tag, table, A, tag_c, _nblk(rc * cc, rc))
                tag = tag_c
                L.P = P
                self.levels.append(Level(A))
        if self.levels:
            last = self.levels[-1]
            by_rows = last.shape[1] <= last.shape[0]
            self.index, self.cells, self.bw = mg.band_order(last.A, by_rows)
            self.L, ok = mg.band_factor(last.A, self.index, self.cells, self.bw)
            if not ok:  # pragma: no cover - P^T A P of a positive definite A is positive definite
                raise UsageError("multigrid: the coarsest operator is not positive definite")
        self.setup_seconds = time.perf_counter() - t0

    def memory_bytes(self) -> int:
        """Bytes of the coarse levels' arrays (stencils, inverse diagonals, corrections, right-hand
        sides, interpolation weights) and of the coarsest factor."""
        total = 0
        for L in self.levels:
            total += L.A.nbytes + L.e.nbytes + L.f.nbytes + (L.P.nbytes if L.P is not None else 0)
        if self.levels:
            total += self.L.nbytes + self.index.nbytes + self.cells.nbytes
        return int(total)

    def interpolation(self, l: int):
        """Interpolation from level l + 1 to level l as triplets (fine index, coarse index, weight).

        Indices number the unknowns of each level in row-major order (as
        :meth:`unknown_index`); for tests and inspection (numpy only).
        """
        from relaxtui.kernels import multigrid as mg

        if l == 0:
            op = self.operator
            rc, cc = _coarse_shape(op.shape)
            P = np.zeros((8, rc + 2, cc + 2))
            mg.block_weights0(op.cls, op.table, self.ptab, self.pflag, P)
            live_f = op.cls[1:-1, 1:-1] != 0
        else:
            P = self.levels[l - 1].P
            live_f = self.levels[l - 1].A[0, 1:-1, 1:-1] > 0.0
        live_c = self.levels[l].A[0, 1:-1, 1:-1] > 0.0
        fi = self.unknown_index(l)
        ci = self.unknown_index(l + 1)
        rows, cols = live_f.shape
        out_f, out_c, out_w = [], [], []
        for i in range(rows):
            for j in range(cols):
                if not live_f[i, j]:
                    continue
                I, J = i // 2, j // 2
                if i % 2 == 0 and j % 2 == 0:
                    terms = [(I, J, 1.0)]
                elif i % 2 == 0:
                    terms = [(I, J, P[0, I + 1, J + 1]), (I, J + 1, P[1, I + 1, J + 1])]
                elif j % 2 == 0:
                    terms = [(I, J, P[2, I + 1, J + 1]), (I + 1, J, P[3, I + 1, J + 1])]
                else:
                    terms = [(I, J, P[4, I + 1, J + 1]), (I, J + 1, P[5, I + 1, J + 1]),
                             (I + 1, J, P[6, I + 1, J + 1]), (I + 1, J + 1, P[7, I + 1, J + 1])]
                for a, b, w in terms:
                    if w != 0.0:
                        if not (0 <= a < live_c.shape[0] and 0 <= b < live_c.shape[1] and live_c[a, b]):
                            raise AssertionError(f"level {l} cell ({i}, {j}) interpolates from a missing coarse cell ({a}, {b})")
                        out_f.append(fi[i, j])
                        out_c.append(ci[a, b])
                        out_w.append(w)
        return np.array(out_f, dtype=np.int64), np.array(out_c, dtype=np.int64), np.array(out_w)

    def unknown_index(self, l: int) -> np.ndarray:
        """(rows, cols) int64 of level l: the unknown's number in row-major order, -1 elsewhere."""
        live = self.operator.cls[1:-1, 1:-1] != 0 if l == 0 else self.levels[l - 1].A[0, 1:-1, 1:-1] > 0.0
        index = np.full(live.shape, -1, dtype=np.int64)
        index[live] = np.arange(int(live.sum()))
        return index

    def stencil_entries(self, l: int):
        """The symmetric 9-point operator of coarse level l >= 1 as triplets (row, col, value), both triangles."""
        A = self.levels[l - 1].A
        idx = self.unknown_index(l)
        rows, cols = idx.shape
        pad = np.full((rows + 2, cols + 2), -1, dtype=np.int64)
        pad[1:-1, 1:-1] = idx
        out_r, out_c, out_v = [], [], []
        for k, (di, dj) in ((0, (0, 0)), (1, (0, 1)), (2, (1, 0)), (3, (1, 1)), (4, (1, -1))):
            src = pad[1:-1, 1:-1]
            dst = pad[1 + di : rows + 1 + di, 1 + dj : cols + 1 + dj]
            val = A[k, 1:-1, 1:-1]
            ok = (src >= 0) & (dst >= 0) & (val != 0.0)
            out_r.append(src[ok])
            out_c.append(dst[ok])
            out_v.append(val[ok])
            if k:
                out_r.append(dst[ok])
                out_c.append(src[ok])
                out_v.append(val[ok])
        return np.concatenate(out_r), np.concatenate(out_c), np.concatenate(out_v)

    def cycle_coarse(self, l: int, omega: float, pre: int, post: int, gamma: int) -> None:
        """Approximately solve A e = f on ``self.levels[l]`` (e zero on entry), in place.

        ``pre`` forward and ``post`` reverse four-colour sweeps around the
        correction from the next level, which is visited ``gamma`` times
        (1: V-cycle, 2: W-cycle); the coarsest level is solved exactly.
        """
        from relaxtui.kernels import multigrid as mg

        L = self.levels[l]
        if l == len(self.levels) - 1:
            mg.band_solve(self.L, self.cells, self.bw, L.f, L.e)
            return
        mg.smooth9(L.e, L.f, L.A, omega, pre, False, L.nblk)
        N = self.levels[l + 1]
        mg.restrict9(L.e, L.f, L.A, L.P, N.f, L.nblk)
        mg.zero_fill(N.e, N.nblk)
        for _ in range(gamma if l + 1 < len(self.levels) - 1 else 1):
            self.cycle_coarse(l + 1, omega, pre, post, gamma)
        mg.prolong9(L.e, L.A, L.P, N.e, L.nblk)
        mg.smooth9(L.e, L.f, L.A, omega, post, True, L.nblk)


class MultigridStepper:
    """Multigrid iterations on an operator's working field; one iteration is one "sweep" of the driver.

    Parameters
    ----------
    operator : relaxtui.solver.assembled.Operator
    krylov : bool
        True (default): conjugate gradients, each iteration preconditioned by
        one symmetric cycle (``krylov_sweeps`` forward red-black sweeps before
        the coarse correction, as many backward after, W below level 1).
        False: the plain cycle as a stationary iteration (``pre`` forward
        sweeps, ``post`` after, ``gamma`` visits of each coarser level).
    pre, post, gamma, krylov_sweeps : int
        Smoothing sweeps and cycle shape (see above); the coarse levels use
        the same counts.
    coarsest : int
        Unknowns of the coarsest level (solved directly).

    Attributes
    ----------
    info : dict
        ``levels`` (list of {shape, unknowns}, finest first), ``setup_seconds``,
        ``cycle`` (a description), ``memory_bytes`` (arrays held beyond the
        operator's own), shown by the UI and put in the report.
    rule_options, max_chunk, chunk_multiple
        What the driver passes to the stopping rule (rate window 2, no
        envelope: the updates of a multigrid iteration fall by a large factor
        each time) and its chunk cap (one iteration: each gains a decade or
        more, so the rule looks after every one).
    """

    rule_options = {"min_window": 2, "envelope": 1}
    max_chunk = 1
    chunk_multiple = 1

    def __init__(self, operator, *, krylov: bool = KRYLOV, pre: int = PRE_SWEEPS, post: int = POST_SWEEPS,
                 gamma: int = GAMMA, krylov_sweeps: int = KRYLOV_SWEEPS, coarsest: int = COARSEST_UNKNOWNS):
        for name, v, lo in (("pre", pre, 0), ("post", post, 1), ("gamma", gamma, 1), ("krylov_sweeps", krylov_sweeps, 1),
                            ("coarsest", coarsest, 1)):
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < lo:
                raise UsageError(f"multigrid: {name} must be a whole number >= {lo}, got {v!r}")
        if gamma > 2:
            raise UsageError(f"multigrid: gamma must be 1 (V-cycle) or 2 (W-cycle), got {gamma}")
        self.operator = operator
        self.krylov = bool(krylov)
        self.pre = int(pre)
        self.post = int(post)
        self.gamma = int(gamma)
        self.krylov_sweeps = int(krylov_sweeps)
        self.coarsest = int(coarsest)
        self._build()
        levels = [{"shape": list(operator.shape), "unknowns": int(operator.unknowns)}]
        levels += [{"shape": list(L.shape), "unknowns": L.unknowns} for L in self.h.levels]
        self.info = {"levels": levels, "setup_seconds": round(self.h.setup_seconds, 6), "cycle": self.describe(),
                     "memory_bytes": self.memory_bytes}

    def _build(self) -> None:
        """The hierarchy and the iteration's buffers (again after :meth:`release`)."""
        from relaxtui.kernels import multigrid as mg

        operator = self.operator
        # per-cell operators (case format v1.1 maps, axisymmetry) have one class per cell: no bulk shortcut
        per_cell = getattr(getattr(operator, "physics", None), "per_cell", False)
        self.h = Hierarchy(operator, self.coarsest, bulk=not per_cell)
        self.direct = not self.h.levels and operator.unknowns > 0
        shape = operator.padded_shape
        held = 0
        if self.direct:  # small problem: the banded Cholesky of level 0 itself
            A = np.zeros((5,) + shape)
            self.b0 = np.zeros(shape)
            mg.planes0(operator.cls, operator.table, operator.diag, A, self.b0)
            self.index0, self.cells0, self.bw0 = mg.band_order(A, operator.shape[1] <= operator.shape[0])
            self.L0, ok = mg.band_factor(A, self.index0, self.cells0, self.bw0)
            if not ok:  # pragma: no cover - the operator of an anchored case is positive definite
                raise UsageError("multigrid: the operator is not positive definite")
            del A
            held += self.b0.nbytes + self.L0.nbytes + self.index0.nbytes + self.cells0.nbytes
        self.u_old = self.w = self.p = None
        if self.krylov and not self.direct:
            # The work field lives in rows 1.. of a buffer with one more row on top: the project's
            # red-black kernel run on the whole buffer (class codes shifted alike) sees every cell's
            # colour flipped, so it sweeps black then red: the adjoint of the forward sweep.
            from relaxtui.kernels import assemble
            from relaxtui.solver.assembled import MIN_RUN

            self._w_big = np.zeros((shape[0] + 1, shape[1]))
            self.w = self._w_big[1:]
            self._cls_b = _shifted_classes(operator)
            self._seg_b = assemble.segments(self._cls_b, MIN_RUN)
            self.p = np.zeros(shape)
            held += self._w_big.nbytes + self._cls_b[0].nbytes + sum(a.nbytes for a in self._seg_b) + self.p.nbytes
        elif not self.direct:
            self.u_old = np.zeros(shape)
            held += self.u_old.nbytes
        self._synced = None
        self._k = 0
        self._rz = 0.0
        self._scratch = np.zeros(max(self.pre, self.post, self.krylov_sweeps) + 1)
        self._scratch2 = np.zeros_like(self._scratch)
        self.memory_bytes = int(held + self.h.memory_bytes())

    def release(self) -> None:
        """Drop the hierarchy and the buffers (the driver calls this when a run ends, before its report:
        the report's own arrays then do not add to them). A later :meth:`sweep` builds them again."""
        self.h = None
        self.u_old = self.w = self.p = self._w_big = self._cls_b = self._seg_b = None
        self.b0 = self.L0 = self.index0 = self.cells0 = None
        self._synced = None

    def describe(self) -> str:
        if self.operator.unknowns == 0:
            return "no unknowns"
        if self.direct:
            return f"direct banded Cholesky of the {self.operator.unknowns} unknowns (a small problem)"
        shape = "W" if self.gamma == 2 else "V"
        coarsest = f"banded Cholesky on the coarsest level ({self.h.levels[-1].unknowns} unknowns)"
        if self.krylov:
            nu = self.krylov_sweeps
            return (f"conjugate gradients preconditioned by one symmetric {shape}({nu},{nu}) cycle: red-black SOR on "
                    f"the finest level (backward after the correction), four-colour SOR on {len(self.h.levels)} "
                    f"Galerkin 9-point coarse levels, {coarsest}")
        return (f"{shape}({self.pre},{self.post}) cycles: red-black SOR on the finest level, four-colour SOR on "
                f"{len(self.h.levels)} Galerkin 9-point coarse levels, {coarsest}")

    # --- cycles ----------------------------------------------------------------------------

    def _segments(self):
        op = self.operator
        return op.row_ptr, op.seg_start, op.seg_end, op.seg_class

    def _correct(self, v, omega, coarse_pre, coarse_post) -> None:
        """v += P e_1 with e_1 from the coarse levels for the residual of v (v: a working array)."""
        from relaxtui.kernels import multigrid as mg

        op = self.operator
        h = self.h
        L1 = h.levels[0]
        mg.restrict0(v, op.cls, op.table, op.diag, *self._segments(), h.ptab, h.pflag, L1.f, h.nblk0)
        mg.zero_fill(L1.e, L1.nblk)
        h.cycle_coarse(0, omega, coarse_pre, coarse_post, self.gamma)
        mg.prolong0(v, op.cls, op.table, h.ptab, h.pflag, L1.e, h.nblk0)

    def cycle(self, u, omega) -> None:
        """One stationary cycle on the field u, in place."""
        from relaxtui.kernels import multigrid as mg

        op = self.operator
        if op.unknowns == 0:
            return
        if self.direct:
            mg.band_solve(self.L0, self.cells0, self.bw0, self.b0, u)
            return
        if self.pre:
            op.sweep(u, "red-black-sor", omega, self.pre, self._scratch, self._scratch2)
        self._correct(u, omega, self.pre, self.post)
        op.sweep(u, "red-black-sor", omega, self.post, self._scratch, self._scratch2)

    def _backward(self, omega, sweeps) -> None:
        """``sweeps`` black-then-red SOR sweeps of the work field (the kernel on the shifted buffer)."""
        import numba

        from relaxtui.kernels import sweeps as k
        from relaxtui.solver.assembled import PARALLEL_CELLS

        op = self.operator
        threads = numba.get_num_threads()
        if threads >= 2 and op.cells_streamed >= PARALLEL_CELLS:
            k.sor_red_black(self._w_big, self._cls_b, op.table, *self._seg_b, omega, sweeps, self._scratch, self._scratch2,
                            max(1, min(threads, op.shape[0] + 1)))
        else:
            k.sor_red_black_serial(self._w_big, self._cls_b, op.table, *self._seg_b, omega, sweeps, self._scratch, self._scratch2)

    def cycle_symmetric(self, omega) -> None:
        """One symmetric cycle on the work field w: forward sweeps, coarse correction, as many backward sweeps.

        With the coarse levels also swept forward then backward the same
        number of times, the cycle's operator B (w -> w + B r(w)) is
        symmetric and positive definite: a valid preconditioner for CG.
        """
        nu = self.krylov_sweeps
        self.operator.sweep(self.w, "red-black-sor", omega, nu, self._scratch, self._scratch2)
        self._correct(self.w, omega, nu, nu)
        self._backward(omega, nu)

    # --- the stepper interface ---------------------------------------------------------------

    def sweep(self, u, omega, sweeps, updates, residuals) -> int:
        """Run ``sweeps`` iterations on the working field ``u`` in place (the driver's call shape).

        Parameters
        ----------
        u : working array of the operator (``new_field``), modified in place.
        omega : float in (0, 2), the smoothers' relaxation factor.
        sweeps : int >= 0; 0 only loads the kernels (before a timed run).
        updates, residuals : float64 arrays of length >= ``sweeps``, written per
            iteration: the largest |change of u| (field units; for CG the exact
            step |alpha p|) and the largest contract residual (CG: of the field
            before the step; cycles: the last relaxation sweep's, as red-black
            SOR reports it).

        Returns
        -------
        int: iterations done; fewer when an update was not finite.

        The stepper remembers its state (CG direction, previous field) between
        calls on the same array; a different array restarts it.
        """
        from relaxtui.kernels import multigrid as mg

        op = self.operator
        op._check_field(u)
        omega = float(omega)
        if not 0.0 < omega < 2.0:
            raise UsageError(f"omega must lie in (0, 2), got {omega}")
        if isinstance(sweeps, bool) or not isinstance(sweeps, (int, np.integer)) or sweeps < 0:
            raise UsageError(f"sweeps must be a whole number >= 0, got {sweeps!r}")
        for name, arr in (("updates", updates), ("residuals", residuals)):
            if not isinstance(arr, np.ndarray) or arr.dtype != np.float64 or arr.ndim != 1 or arr.shape[0] < sweeps:
                raise UsageError(f"{name} must be a 1-D float64 array of length >= {sweeps}")
        if self.h is None:
            self._build()
        if sweeps == 0:
            self._warm(u, omega)
            return 0
        nb = self.h.nblk0
        key = (u.__array_interface__["data"][0], u.shape)
        if self._synced != key and not self.direct:
            mg.copy_into(u, self.w if self.krylov else self.u_old, nb)
            self._synced = key
            self._k = 0
        done = 0
        for k in range(int(sweeps)):
            if op.unknowns == 0:
                du = res = 0.0
            elif self.direct:
                at = (self.cells0[:, 0], self.cells0[:, 1])
                before = u[at]
                self.cycle(u, omega)
                du = float(np.max(np.abs(u[at] - before)))
                res = op.residual(u)
            elif not self.krylov:
                self.cycle(u, omega)
                du = mg.delta_copy(u, self.u_old, nb)
                res = float(self._scratch2[self.post - 1])
            else:
                du, res = self._cg_step(u, omega)
            updates[k] = du
            residuals[k] = res
            done = k + 1
            if not math.isfinite(du):
                break
        return done

    def _cg_step(self, u, omega):
        """One iteration of preconditioned conjugate gradients on the field u (w == u on entry and exit)."""
        from relaxtui.kernels import multigrid as mg

        op = self.operator
        nb = self.h.nblk0
        self.cycle_symmetric(omega)  # w = u + B r(u): the preconditioned residual is z = w - u
        rz, res = mg.pcg_rz(u, self.w, op.cls, op.table, op.diag, *self._segments(), nb)
        # beta only from dot products float64 holds to full precision: on a field of magnitude 1e-150
        # or below r . z is subnormal or 0 (a product of two such numbers), and beta = 0 restarts CG
        beta = rz / self._rz if (self._k > 0 and _exact_dot(self._rz) and _exact_dot(rz)) else 0.0
        mg.fcg_direction(self.w, u, self.p, beta, nb)  # p = z + beta p
        pap, pr, _ = mg.fcg_dots(u, self.p, op.cls, op.table, op.diag, *self._segments(), nb)
        scaled = False
        if not (_exact_dot(pap) and math.isfinite(pr)):
            # p . A p under- or overflowed (a field near 1e-150 or below, or a huge one): the line search
            # is invariant under p -> s p (alpha -> alpha / s, the step alpha p the same), so scale p by a
            # power of two (exact) to magnitude 1 and take the dot products again; the next step restarts
            # CG (beta = 0), since p is no longer in the units beta refers to
            top = float(np.max(np.abs(self.p)))
            if 0.0 < top < math.inf:
                self.p *= 2.0 ** -math.frexp(top)[1]
                pap, pr, _ = mg.fcg_dots(u, self.p, op.cls, op.table, op.diag, *self._segments(), nb)
                scaled = True
        alpha = pr / pap if (pap > 0.0 and math.isfinite(pap)) else 0.0  # exact line search along p (pr = p . r(u))
        du = mg.fcg_update(u, self.p, alpha, self.w, nb)  # u += alpha p; w = u
        self._rz = 0.0 if scaled else rz
        self._k += 1
        return du, res

    def inverse_norm(self, omega: float = DEFAULT_OMEGA) -> float | None:
        """``||(I - W)^-1||_inf`` bounded from above, solved for with this stepper's own hierarchy, or None.

        The norm is ``max w`` for the solution of ``(I - W) w = 1`` (relaxtui.solver.conditioning
        explains why). Conjugate gradients preconditioned by the symmetric cycle, on the equations
        with every right-hand side 1 and every fixed value 0, run from ``x = 0`` until the largest
        residual ``rho = max |1 - (I - W) x|`` is at most ``INVERSE_NORM_RESIDUAL``. Then
        ``max x / (1 - rho)`` bounds the norm from above, whatever the error of x: ``w - x =
        (I - W)^-1 r`` gives ``max w <= max x + max w * rho`` (and it is within ``(1 + rho) /
        (1 - rho)`` of it). The bound, not an estimate, matters: steepest descent settled by its steps
        (this method's first form) and the Lanczos estimate of the Jacobi radius both fell short on a
        128 x 128 random half-and-half mix of conductivity 1 and a low one (measured: the Lanczos
        estimate 3 and 1400 times below the exact norm at contrasts 1e4 and 1e8), and the rounding
        floor built on them let a run call a field converged 3 times its tolerance away from the
        answer (contrast 1e7).

        Where float64 keeps the residual from falling that far (contrasts of 1e7 and more), the
        settled ``max x`` with a margin is returned instead, an estimate (:func:`inverse_norm_found`).
        The iterate takes a field-sized array for the call (the CG direction and the cycle's work
        vector are the stepper's own); the CG state of the run is dropped: the next :meth:`sweep`
        restarts CG from its field. Returns None (the caller estimates the norm otherwise) for the
        direct and plain-cycle variants, after :meth:`release`, or when ``INVERSE_NORM_STEPS`` steps
        settle neither.
        """
        op = self.operator
        if self.h is None or self.direct or not self.krylov or op.unknowns == 0:
            return None
        rhs = np.ones(op.table.shape[0])
        return self._solve_classes(rhs, omega, inverse_norm_found)[0]

    def residual_bound(self, u, inv: float, omega: float = DEFAULT_OMEGA) -> float | None:
        """A bound of ``max |u - u_exact|`` that weighs each residual by where it lies, or None.

        ``u_exact - u = (I - W)^-1 r`` and ``(I - W)^-1 >= 0`` (an M-matrix), so cell by cell
        ``|u - u_exact| <= (I - W)^-1 rho`` with ``rho`` each class's largest |residual|: CG (as in
        :meth:`inverse_norm`) solves ``(I - W) x = rho`` and ``max x + inv * max|s|`` bounds it, s the
        last iterate's residual and ``inv`` an upper bound of ``||(I - W)^-1||_inf``. Far sharper than
        ``inv * max|r|`` where the residual is uneven: at conductivity jumps the normalised residual of the
        low-conductivity cells stays large (their rounding, divided by a small diagonal), while a walk
        from the well-conducting cells seldom enters them (measured on a 96 x 96 random 1:1e5 mix: 1.1e-3
        plain, 2e-8 weighted, true error 9e-9). Takes a field-sized array for the call; the CG state
        of the run is dropped, as by :meth:`inverse_norm`."""
        from relaxtui.kernels import measure

        op = self.operator
        if self.h is None or self.direct or not self.krylov or op.unknowns == 0:
            return None
        rho = np.zeros(op.table.shape[0])
        measure.class_residual_max(u, op.cls, op.table, rho)
        return weighted_bound(rho, inv, lambda rhs, decide: self._solve_classes(rhs, omega, decide))

    def _solve_classes(self, rhs, omega, decide):
        """CG preconditioned by the symmetric cycle on ``(I - W) x = rhs[class]`` (every fixed value 0) from
        ``x = 0``, in a field-sized array of the call's own and CG's two work vectors (the run's CG
        restarts at its next :meth:`sweep`). After each step ``decide(rho, tops)`` (rho the iterate's
        largest residual, tops its largest value after each step) may return the answer. Returns
        (answer or None, rho, max x) of the last iterate (``INVERSE_NORM_STEPS`` steps at most)."""
        from relaxtui.kernels import multigrid as mg

        op = self.operator
        nb = self.h.nblk0
        x, w, p = np.zeros_like(self.p), self.w, self.p
        table = op.table
        system = table.copy()
        system[1:, 4] = rhs[1:]  # row 0 is no unknown's class
        self._synced = None  # w and p are taken over: the next sweep restarts CG from its field
        self._k = 0
        self._rz = 0.0
        found = None
        tops = []
        rho = math.inf
        try:
            op.table = system  # the cycle's kernels read the operator's table (right-hand sides in column 4)
            mg.zero_fill(w, nb)
            mg.zero_fill(p, nb)
            rz_prev = 0.0
            for k in range(INVERSE_NORM_STEPS + 1):
                self.cycle_symmetric(omega)  # w = x + B r(x)
                rz, rho = mg.pcg_rz(x, w, op.cls, system, op.diag, *self._segments(), nb)
                if k > 0:
                    tops.append(float(np.max(x)))
                found = decide(rho, tops)
                if found is not None or not math.isfinite(rho) or k == INVERSE_NORM_STEPS:
                    break  # a NaN residual is NaN's bits: not finite
                beta = rz / rz_prev if (k > 0 and _exact_dot(rz_prev) and _exact_dot(rz)) else 0.0
                mg.fcg_direction(w, x, p, beta, nb)  # p = z + beta p
                pap, pr, _ = mg.fcg_dots(x, p, op.cls, system, op.diag, *self._segments(), nb)
                alpha = pr / pap if (pap > 0.0 and math.isfinite(pap)) else 0.0
                if alpha == 0.0:
                    break
                mg.fcg_update(x, p, alpha, w, nb)  # x += alpha p; w = x
                rz_prev = rz
        finally:
            op.table = table
            mg.zero_fill(self.p, nb)
        return found, rho, (tops[-1] if tops else 0.0)

    def _warm_on_a_small_grid(self, omega) -> bool:
        """Load a big problem's iteration kernels by running one iteration of a small model problem's
        (``WARM_GRID`` cells square, coarsened as deep): a warm-up on the problem itself costs a whole
        cycle of it (10 s at 16 383²). False (nothing done) where the small operator's array types
        might differ: per-cell operators, more than 256 classes, stationary or direct variants, grids
        below ``WARM_SMALL_FROM`` cells or run on one thread (the kernels' serial builds)."""
        from relaxtui.solver.assembled import Operator

        op = self.operator
        per_cell = getattr(getattr(op, "physics", None), "per_cell", False)
        if (per_cell or self.direct or not self.krylov or op.cls.dtype != np.uint8 or op.cells_streamed < WARM_SMALL_FROM
                or self.h.nblk0 < 2 or _threads() < 2):
            return False
        small = Operator(_warm_case())
        if small.cls.dtype != op.cls.dtype or getattr(getattr(small, "physics", None), "per_cell", False):
            return False
        st = MultigridStepper(small, coarsest=WARM_COARSEST)
        if st.direct or st.h.nblk0 < 2:
            return False
        u = small.new_field()
        upd, res = np.zeros(1), np.zeros(1)
        st.sweep(u, omega, 1, upd, res)
        return True

    def _warm(self, u, omega) -> None:
        """Load (or compile) every kernel of an iteration without changing u: a step of length 0."""
        key = (self.operator.cls.dtype.str, self.krylov, self.direct)
        if key in _WARM or self.operator.unknowns == 0:
            return
        from relaxtui.kernels import multigrid as mg

        if self._warm_on_a_small_grid(omega):
            _WARM.add(key)
            return
        nb = self.h.nblk0
        if self.direct:
            mg.band_solve(self.L0, self.cells0, self.bw0, self.b0, u.copy())
        elif self.krylov:
            mg.copy_into(u, self.w, nb)
            self.cycle_symmetric(omega)
            mg.pcg_rz(u, self.w, self.operator.cls, self.operator.table, self.operator.diag, *self._segments(), nb)
            mg.fcg_direction(self.w, u, self.p, 0.0, nb)
            mg.fcg_dots(u, self.p, self.operator.cls, self.operator.table, self.operator.diag, *self._segments(), nb)
            mg.fcg_update(u, self.p, 0.0, self.w, nb)  # alpha 0: u unchanged, w = u again
            self.p[...] = 0.0
        else:
            mg.copy_into(u, self.u_old, nb)
            self.cycle(self.u_old, omega)  # on the copy
            mg.delta_copy(u, self.u_old, nb)  # u_old = u again
        self._synced = None
        _WARM.add(key)


_TINY_DOT = float(np.finfo(float).tiny) / float(np.finfo(float).eps)  # about 1e-292: below it a dot product's terms may be subnormal


def _exact_dot(value: float) -> bool:
    """Whether a dot product of CG is a normal, finite float64 number, far enough from the subnormal range
    that its terms kept their precision (IEEE 754 binary64's smallest normal number, common practice)."""
    return _TINY_DOT < abs(value) < math.inf


def inverse_norm_found(rho: float, tops: list) -> float | None:
    """The norm of the inverse from the CG of :meth:`MultigridStepper.inverse_norm` (None: step on).

    ``rho`` is the largest residual of the iterate, ``tops`` its largest value after each step so
    far. With ``rho <= INVERSE_NORM_RESIDUAL``: the bound ``max x / (1 - rho)``. Otherwise, once
    ``max x`` has settled (within ``INVERSE_NORM_SETTLE`` over each of the last two windows of
    ``INVERSE_NORM_WINDOW`` steps), the largest value of those windows plus twice that margin: an
    estimate, where float64 keeps the residual from falling (measured on a 128 x 128 half-and-half
    random mix of conductivities 1 and 1e-8: ``max x`` within 1 % of the exact norm after 150-200
    steps, its residual still 1e3 to 1e6 after 800). Shared by the single-process and the
    distributed solve, which must decide alike."""
    top = tops[-1] if tops else 0.0
    if rho <= INVERSE_NORM_RESIDUAL and math.isfinite(top):
        return max(top / (1.0 - rho), 1.0)
    n = INVERSE_NORM_WINDOW
    if len(tops) <= 2 * n:
        return None
    a, b, c = tops[-1 - 2 * n], tops[-1 - n], top
    if not (math.isfinite(c) and c > 0.0 and abs(c - b) <= INVERSE_NORM_SETTLE * c and abs(b - a) <= INVERSE_NORM_SETTLE * b):
        return None
    return max(max(tops[-1 - 2 * n :]) * (1.0 + 2.0 * INVERSE_NORM_SETTLE), 1.0)


def weighted_bound(rho: np.ndarray, inv: float, solve) -> float | None:
    """:meth:`MultigridStepper.residual_bound` from each class's largest residual ``rho`` (row 0 ignored)
    and a ``solve(rhs, decide)`` of ``(I - W) x = rhs`` (``_solve_classes``): ``max x + inv * max|s|`` once
    ``inv * max|s|`` is ``RESIDUAL_BOUND_SLACK`` of ``max x`` or the steps run out (then looser, still a
    bound); None for a non-finite residual or norm. Shared by the single-process and the distributed solve."""
    if not 0.0 < inv < math.inf:
        return None
    rho = rho.copy()
    rho[0] = 0.0
    if not np.all(np.isfinite(rho)):
        return None
    if not rho.any():
        return 0.0

    def settled(res, tops):
        top = tops[-1] if tops else 0.0
        if top > 0.0 and inv * res <= RESIDUAL_BOUND_SLACK * top:
            return top + inv * res
        return None

    found, res, top = solve(rho, settled)
    if found is None and math.isfinite(res) and math.isfinite(top):
        found = max(top, 0.0) + inv * res
    return found if found is not None and math.isfinite(found) else None


def _shifted_classes(operator) -> np.ndarray:
    """The operator's class codes with one more row (of zeros) on top, for the backward sweep.

    The operator's own ``cls`` becomes the view of rows 1.. of that buffer (same values, same type,
    C-contiguous): one copy of the codes, not two. Again after a release, the buffer is found
    through the view.
    """
    cls = operator.cls
    base = cls.base
    if (isinstance(base, np.ndarray) and base.dtype == cls.dtype and base.shape == (cls.shape[0] + 1, cls.shape[1])
            and base.flags.c_contiguous and base[1:].ctypes.data == cls.ctypes.data):
        return base
    big = np.zeros((cls.shape[0] + 1, cls.shape[1]), dtype=cls.dtype)
    big[1:] = cls
    operator.cls = big[1:]
    return big


def _warm_case():
    """A small model problem (one material, a fixed frame at 0 and 1) whose operator's arrays have the
    types of a big one's (the same class dtype, row segments streamed in parallel): what
    :meth:`MultigridStepper._warm` loads the kernels on."""
    from relaxtui.case.model import Case, Region
    from pathlib import Path

    n = WARM_GRID
    codes = np.full((n, n), 0, dtype=np.uint8)
    codes[0, :] = codes[-1, :] = codes[:, 0] = codes[:, -1] = 1
    codes[0, 1:-1] = 2
    regions = (Region(name="plate", color="#ffffff", kind="interior", conductivity=1.0),
               Region(name="cold", color="#0000ff", kind="fixed", value=0.0),
               Region(name="hot", color="#ff0000", kind="fixed", value=1.0))
    return Case(path=None, mask_path=Path("warm.png"), regions=regions, codes=codes)


_WARM: set = set()  # (class dtype, krylov, direct) whose kernels this process has loaded
