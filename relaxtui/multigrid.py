"""Multigrid (design notes are completed below once measured)."""

from __future__ import annotations

import math
import time

import numpy as np

from relaxtui.errors import UsageError

DEFAULT_OMEGA = 1.0
PRE_SWEEPS = 2
POST_SWEEPS = 1
COARSEST_UNKNOWNS = 2048
PARALLEL_CELLS = 1 << 14


def _threads() -> int:
    import numba

    return max(1, int(numba.get_num_threads()))


def _nblk(cells: int, rows: int) -> int:
    threads = _threads()
    if threads < 2 or cells < PARALLEL_CELLS:
        return 1
    return max(1, min(threads, rows))


def level0_tables(table: np.ndarray):
    """Per-class interpolation weights of level 0: (ptab (classes, 4), pflag (classes,) uint8).

    ptab[c] = (row-cell weight to the west C cell, to the east one,
    column-cell weight to the north C cell, to the south one) for a cell of
    class c in that position; a position without sources gets (1, 0)
    (aggregated into its block). pflag holds ROW_LOST, COLUMN_LOST and
    ISOLATED bits. Class 0 (not an unknown) gets zeros.
    """
    from relaxtui.kernels.multigrid import COLUMN_LOST, ISOLATED, ROW_LOST

    tn, ts, tw, te = (table[:, k] for k in range(4))
    row_lost = (tw + te) <= 0.0
    col_lost = (tn + ts) <= 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        den_h = 1.0 - tn - ts
        den_v = 1.0 - tw - te
        ptab = np.zeros((table.shape[0], 4))
        ptab[:, 0] = np.where(row_lost, 1.0, tw / den_h)
        ptab[:, 1] = np.where(row_lost, 0.0, te / den_h)
        ptab[:, 2] = np.where(col_lost, 1.0, tn / den_v)
        ptab[:, 3] = np.where(col_lost, 0.0, ts / den_v)
    pflag = (row_lost * ROW_LOST + col_lost * COLUMN_LOST + (row_lost & col_lost) * ISOLATED).astype(np.uint8)
    ptab[0] = 0.0
    pflag[0] = 0
    return np.ascontiguousarray(ptab), pflag


class Level:
    """A coarse level: stencil planes A (5, R + 2, C + 2), correction e, right-hand side f,
    and (unless coarsest) interpolation planes P (8, Rc + 2, Cc + 2) to the next level."""

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
    def __init__(self, operator, coarsest: int = COARSEST_UNKNOWNS):
        from relaxtui.kernels import multigrid as mg

        t0 = time.perf_counter()
        self.operator = operator
        self.ptab, self.pflag = level0_tables(operator.table)
        rows, cols = operator.shape
        self.nblk0 = _nblk(rows * cols, rows)
        self.levels: list[Level] = []
        if operator.unknowns > coarsest and (rows > 1 or cols > 1):
            rc, cc = _coarse_shape(operator.shape)
            A = np.zeros((5, rc + 2, cc + 2))
            mg.galerkin0(operator.cls, operator.table, operator.diag, self.ptab, self.pflag, A, _nblk(rc * cc, rc))
            self.levels.append(Level(A))
            while True:
                L = self.levels[-1]
                if L.unknowns <= coarsest or L.shape == (1, 1):
                    break
                rc, cc = _coarse_shape(L.shape)
                P = np.zeros((8, rc + 2, cc + 2))
                lost = np.zeros((rc + 2, cc + 2), dtype=np.uint8)
                mg.interpolation9(L.A, P, lost, L.nblk)
                A = np.zeros((5, rc + 2, cc + 2))
                mg.galerkin9(L.A, P, A, _nblk(rc * cc, rc))
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

    def cycle_coarse(self, l: int, omega: float, pre: int, post: int, gamma: int) -> None:
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
    """``sweep`` runs multigrid cycles on the operator's working field (one cycle = one "sweep")."""

    rule_options = {"min_window": 2, "envelope": 1}
    max_chunk = 1

    def __init__(self, operator, *, pre: int = PRE_SWEEPS, post: int = POST_SWEEPS, gamma: int = 1,
                 coarsest: int = COARSEST_UNKNOWNS):
        self.operator = operator
        self.pre = pre
        self.post = post
        self.gamma = gamma
        self.h = Hierarchy(operator, coarsest)
        self.u_old = np.zeros(operator.padded_shape)
        self._synced = None
        self._scratch = np.zeros(max(pre, post, 1) + 1)
        self._scratch2 = np.zeros(max(pre, post, 1) + 1)
        levels = [{"shape": list(operator.shape), "unknowns": int(operator.unknowns)}]
        levels += [{"shape": list(L.shape), "unknowns": L.unknowns} for L in self.h.levels]
        self.info = {"levels": levels, "setup_seconds": round(self.h.setup_seconds, 6),
                     "cycle": f"V({pre},{post}) gamma={gamma}"}

    def cycle(self, u, omega) -> None:
        from relaxtui.kernels import multigrid as mg

        op = self.operator
        h = self.h
        if op.unknowns == 0:
            return
        if not h.levels:
            op.sweep(u, "red-black-sor", omega, 1, self._scratch, self._scratch2)  # tiny problem: one relaxation
            return
        op.sweep(u, "red-black-sor", omega, self.pre, self._scratch, self._scratch2)
        L1 = h.levels[0]
        mg.restrict0(u, op.cls, op.table, op.diag, op.row_ptr, op.seg_start, op.seg_end, op.seg_class, h.ptab, h.pflag,
                     L1.f, h.nblk0)
        mg.zero_fill(L1.e, L1.nblk)
        h.cycle_coarse(0, omega, self.pre, self.post, self.gamma)
        mg.prolong0(u, op.cls, op.table, h.ptab, h.pflag, L1.e, h.nblk0)
        op.sweep(u, "red-black-sor", omega, max(self.post, 1), self._scratch, self._scratch2)

    def sweep(self, u, omega, sweeps, updates, residuals) -> int:
        from relaxtui.kernels import multigrid as mg

        key = (u.__array_interface__["data"][0], u.shape)
        if self._synced != key:
            mg.copy_into(u, self.u_old, self.h.nblk0)
            self._synced = key
        done = 0
        for k in range(sweeps):
            self.cycle(u, omega)
            du = mg.delta_copy(u, self.u_old, self.h.nblk0)
            updates[k] = du
            residuals[k] = self._scratch2[max(self.post, 1) - 1]  # the last relaxation sweep's largest residual
            done = k + 1
            if not math.isfinite(du):
                break
        return done
