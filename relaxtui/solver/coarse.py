"""The Jacobi spectral radius of a large operator from a coarse level, corrected on the fine grid.

The fine-grid Lanczos estimate (:class:`relaxtui.solver.radius.Lanczos`) keeps
three float64 vectors of the padded grid, 24 bytes per cell, beside the
working field. This estimate keeps 9 bytes per cell and costs a fraction
of the time:

1. **Coarse level.** 2 x 2 blocks of fine cells are aggregated (piecewise-
   constant prolongation P): the Galerkin operator P^T A P with the block mass
   P^T D P (diagonal, since blocks are disjoint) has a 5-point stencil and is
   built from the fine class table in one pass (:mod:`relaxtui.kernels.coarse`,
   3 float32 arrays and sqrt of the block mass, 4 bytes per fine cell).
2. **Coarse Lanczos** on its symmetric form, two float64 coarse vectors
   (4 bytes per fine cell: the operator is applied in place over the previous vector), with the stopping rule of the fine estimate
   (:class:`relaxtui.solver.radius.RitzRule`). The top Ritz value bounds the
   coarse radius from below, which bounds the fine one from below (a Rayleigh
   quotient over the range of P), but the aggregation's piecewise-constant
   functions carry about twice the energy of the smooth mode: on its own it
   would put 1 - μ about 2x too high.
3. **Ritz vector.** Lanczos is run again from the same start vector and the
   top eigenvector of the tridiagonal matrix is summed over the regenerated
   vectors (one more coarse vector, float32: 1 byte per fine cell).
4. **Fine correction.** The Ritz vector is prolonged into one float32 fine
   vector (4 bytes per cell; the coarse arrays are freed first), smoothed by a
   few red-black Gauss-Seidel sweeps of J x = x (which remove the block jumps,
   high frequencies, and barely touch the smooth mode) and the Rayleigh
   quotient x^T D J x / x^T D x is taken in one streaming pass that computes
   J x on the fly. It bounds μ from below; its error is quadratic in the
   vector's error (Rayleigh-quotient property, e.g. Parlett, *The Symmetric
   Eigenvalue Problem*, §4.6), which keeps float32 storage harmless: rounding
   at 6e-8 moves the quotient by about 1e-15.

The result errs low like the fine Lanczos estimate, and the driver corrects it
from the factor SOR shows in the same way.

Every inner product is summed by rows (each row in column order, in the
kernels) and the row sums are added in one exactly rounded sum
(:func:`row_sum`, ``math.fsum``): the estimate is the same number for any
count of numba threads, and the strips of an MPI job
(:mod:`relaxtui.parallel.coarse`) reproduce it bit for bit.
"""

from __future__ import annotations

import math

import numpy as np

from relaxtui.solver.young import sor_sweeps as _sor_sweeps

SMOOTHING_SWEEPS = 16  # red-black Gauss-Seidel sweeps on the prolonged Ritz vector (tests/test_coarse_radius.py)
BYTES_PER_CELL = 9  # the peak of stages 1-3 per fine cell: coarse operator 4, two Lanczos vectors 4, Ritz vector 1


def row_sum(rows: np.ndarray) -> float:
    """The exactly rounded sum of per-row partial sums (math.fsum: independent of their order)."""
    return math.fsum(rows.tolist())


def coarse_shape(rows: int, cols: int) -> tuple[int, int]:
    """The padded coarse layout of a rows x cols fine grid (2 x 2 blocks, the last ones partial)."""
    return ((rows + 1) // 2 + 2, (cols + 1) // 2 + 2)


class CoarseLanczos:
    """A resumable two-level estimate of ρ(J), the interface of :class:`relaxtui.solver.radius.Lanczos`.

    Parameters
    ----------
    cls, table, diag : ndarray
        The fine operator (padded class array, class table, diagonal per class).
    min_steps, max_steps, budget, rtol, method_sweeps
        The coarse Lanczos stopping rule (:class:`relaxtui.solver.radius.RitzRule`); ``budget``
        counts coarse steps, a quarter of a fine one each, against the method's sweeps.
    smoothing : int
        Red-black sweeps on the prolonged vector before the fine Rayleigh quotient.

    ``steps`` counts coarse Lanczos steps; ``mu`` is the coarse estimate while it
    runs and the fine one once :attr:`done`; ``stage`` is "coarse", "vector", "fine" or "done".
    """

    def __init__(self, cls: np.ndarray, table: np.ndarray, diag: np.ndarray, *, min_steps: int = 100,
                 max_steps: int = 600, budget: float = 2.4, rtol: float = 0.01, method_sweeps=_sor_sweeps,
                 smoothing: int = SMOOTHING_SWEEPS):
        from relaxtui.kernels import coarse, spectral
        from relaxtui.solver.radius import RitzRule

        self._k = coarse
        self._scale = spectral.scale_into
        self.cls, self.table, self.diag = cls, table, diag
        self.smoothing = int(smoothing)
        self.rule = RitzRule(min_steps, max_steps, budget, rtol, method_sweeps)
        self.max_steps = self.rule.max_steps
        self.fine_mu: float | None = None
        self.coarse_mu = 0.0
        rows, cols = cls.shape[0] - 2, cls.shape[1] - 2
        shape = coarse_shape(rows, cols)
        self.sq = np.zeros(shape, dtype=np.float32)
        coarse.block_mass(cls, diag, self.sq)
        self.cb = np.zeros(shape, dtype=np.float32)
        self.eb = np.zeros(shape, dtype=np.float32)
        self.sb = np.zeros(shape, dtype=np.float32)
        coarse.block_couplings(cls, table, diag, self.sq, self.cb, self.eb, self.sb)
        self.v = np.zeros(shape)
        self._rows = np.zeros(shape[0])  # per-row partial sums of the inner products
        coarse.start_vector(self.sq, self.v, self._rows)
        self._norm = math.sqrt(row_sum(self._rows[1:-1]))
        self.stage = "coarse"
        if self._norm == 0.0:
            self.rule.settled = self.rule.done = True
            self.stage = "done"
            self._release()
            return
        self._scale(self.v, 1.0 / self._norm, self.v)
        self.w = np.zeros(shape)  # the previous Lanczos vector, then the next one
        self.beta = 0.0
        self._replay = 0  # steps regenerated in the "vector" stage
        self._ritz = None  # the tridiagonal matrix's top eigenvector
        self.y = None

    # -- the Lanczos interface ----------------------------------------------------------------
    @property
    def steps(self) -> int:
        return self.rule.steps

    @property
    def settled(self) -> bool:
        return self.rule.settled

    @property
    def done(self) -> bool:
        return self.stage == "done"

    @property
    def mu(self) -> float:
        return self.fine_mu if self.fine_mu is not None else self.rule.mu

    def estimate(self):
        from relaxtui.solver.radius import RadiusEstimate

        return RadiusEstimate(self.mu, self.rule.steps, self.rule.settled)

    def _release(self) -> None:
        self.v = self.w = self.y = None
        self.sq = self.cb = self.eb = self.sb = None

    # -- the stages ---------------------------------------------------------------------------
    def _step(self):
        """One Lanczos step on the coarse operator, two vectors (``v``, and ``w`` holding the previous
        one): afterwards w is the next vector, unnormalised. Returns (alpha, beta)."""
        k, rows = self._k, self._rows
        k.apply_step(self.v, self.w, self.beta, self.cb, self.eb, self.sb, rows)
        alpha = row_sum(rows[1:-1])
        k.subtract_scaled(self.w, alpha, self.v, rows)
        return alpha, math.sqrt(row_sum(rows[1:-1]))

    def _shift(self, beta_new: float) -> None:
        self.beta = beta_new
        self._scale(self.w, 1.0 / beta_new, self.w)
        self.v, self.w = self.w, self.v

    def _begin_replay(self) -> None:
        k = self._k
        # numpy's eigh on the dense tridiagonal (at most max_steps = 600 square: tens of ms, once); scipy is
        # not a dependency of the package, only of its tests
        n = self.rule.steps
        t = np.diag(self.rule.alphas[:n])
        if n > 1:
            off = self.rule.betas[: n - 1]
            t += np.diag(off, 1) + np.diag(off, -1)
        values, vectors = np.linalg.eigh(t)
        self.coarse_mu = float(values[-1])
        self._ritz = np.ascontiguousarray(vectors[:, -1])
        self.w.fill(0.0)
        k.start_vector(self.sq, self.v, self._rows)
        self._scale(self.v, 1.0 / self._norm, self.v)
        self.beta = 0.0
        self.y = np.zeros(self.v.shape, dtype=np.float32)  # rounding it is harmless (see the module docstring)
        self._replay = 0
        self.stage = "vector"

    def _fine(self) -> None:
        k = self._k
        y, sq = self.y, self.sq
        self.v = self.w = None
        self.cb = self.eb = self.sb = None  # the coarse operator is not needed any more
        x = np.empty(self.cls.shape, dtype=np.float32)
        k.prolong(y, sq, self.cls, x, 0, 0, x.shape[0])
        self.y = self.sq = y = sq = None
        for _ in range(self.smoothing):
            k.smooth_colour(x, self.cls, self.table, 0)
            k.smooth_colour(x, self.cls, self.table, 1)
        num_rows, den_rows = np.zeros(x.shape[0]), np.zeros(x.shape[0])
        k.rayleigh(x, self.cls, self.table, self.diag, num_rows, den_rows)
        del x
        num, den = row_sum(num_rows[1:-1]), row_sum(den_rows[1:-1])
        quotient = num / den if den > 0.0 else 0.0
        # both are lower bounds of the fine radius (Rayleigh quotients): the larger is the better
        self.fine_mu = min(max(quotient, self.rule.mu, 0.0), 1.0 - 1e-16)
        self.stage = "done"

    def advance(self, max_new_steps: int | None = None, stop=None, on_step=None) -> bool:
        """Run steps (coarse Lanczos steps, then their replay, then the fine pass); returns ``done``.
        ``stop``: a threading.Event; ``on_step(self)`` after each coarse Lanczos step."""
        new = 0
        while self.stage != "done":
            if stop is not None and stop.is_set():
                break
            if max_new_steps is not None and new >= max_new_steps:
                break
            new += 1
            if self.stage == "coarse":
                alpha, beta_new = self._step()
                self.rule.record_step(alpha, beta_new)
                if not self.rule.done:
                    self._shift(beta_new)
                else:
                    self._begin_replay()
                if on_step is not None:
                    on_step(self)
            elif self.stage == "vector":
                self._k.add_scaled(self.y, float(self._ritz[self._replay]), self.v)
                self._replay += 1
                if self._replay >= self.rule.steps:
                    self._fine()
                    continue
                _, beta_new = self._step()
                self._shift(beta_new)
        return self.done
