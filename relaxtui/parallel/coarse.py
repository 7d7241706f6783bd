"""The two-level Jacobi-radius estimate (relaxtui.solver.coarse) with its arrays split across the ranks.

The stages, kernels and numbers are those of one process's
:class:`relaxtui.solver.coarse.CoarseLanczos`; what is split:

- **Coarse rows by blocks.** Coarse row k covers grid rows 2k and 2k + 1. A
  rank owns the coarse rows whose first grid row is in its strip [a, b):
  k in [ceil(a/2), ceil(b/2)). When b is odd the last of them straddles the
  strip's edge: its second grid row is the strip's lower halo row, whose
  classes the rank already holds, so the Galerkin block is built from the same
  cells as in one process. (A strip of one row starting at an odd row owns no
  coarse row; its neighbours then trade coarse rows with each other.)
- **Coarse Lanczos** on the owned rows plus one halo row each side (the
  block mass, the south coupling and the vector being applied are traded with
  the neighbours). Every inner product is summed by rows in the kernels; the
  row sums of all ranks are gathered in row order and added with ``math.fsum``
  (exactly rounded), so every rank gets the number one process computes, bit
  for bit, whatever the ranks and threads. Rank 0 keeps the stopping rule and
  the tridiagonal matrix, decides after each step and broadcasts the decision;
  at the end of the coarse stage it broadcasts the Ritz coefficients.
- **Fine correction** on the strips: the prolonged Ritz vector on each rank's
  own rows (the coarse row above a strip that starts at an odd row comes from
  the rank above), red-black smoothing with a halo exchange after each colour
  (the colours by global row, as in the sweeps), and the Rayleigh quotient's
  row sums gathered on rank 0.
"""

from __future__ import annotations

import functools
import inspect
import math

import numpy as np

from relaxtui.parallel.comm import mpi, wait_yielding
from relaxtui.solver.coarse import CoarseLanczos, coarse_shape, row_sum
from relaxtui.solver.radius import RadiusEstimate, RitzRule

TAG_C_UP, TAG_C_DOWN = 51, 52  # coarse rows travelling to the rank above / below
TAG_Y, TAG_SQ = 53, 54  # the coarse row above a strip that starts at an odd grid row (the fine stage)

# What is left of an estimate, in coarse steps, for DistributedRadiusJob.affordable before a step is timed.
# Measured at 4096^2 on 2 ranks (the aquifer demo, load average 2): 600 coarse steps, their 600 replays and
# the fine stage took 11.8 s against 25 ms a red-black sweep, about 0.4 sweeps a step (0.5 is used); a
# smoothing sweep of the fine stage is one red-black sweep of a float32 vector, about 2.5 coarse steps.
STEP_SWEEPS = 0.5
FINE_STEPS_PER_SMOOTHING = 2.5

@functools.cache
def coarse_defaults() -> dict:
    """The default options of the single-process :class:`relaxtui.solver.coarse.CoarseLanczos`."""
    return {k: v.default for k, v in inspect.signature(CoarseLanczos.__init__).parameters.items()
            if v.default is not v.empty}


def block_rows(a: int, b: int) -> tuple[int, int]:
    """The coarse rows [ka, kb) owned by the strip of grid rows [a, b): those whose first grid row 2k is in it."""
    return (a + 1) // 2, (b + 1) // 2


class StripCoarse:
    """One rank's share of the two-level estimate (every rank holds one while it runs; see the module docstring).

    Made by :func:`begin` (collective). ``stage`` is "coarse", "vector", "fine" or "done" as in one process.
    """

    def __init__(self, strip, smoothing: int):
        from relaxtui.kernels import coarse

        MPI = mpi()
        self.strip = strip
        self.comm = strip.comm
        self.rank = strip.rank
        self.smoothing = int(smoothing)
        self._k = coarse
        blocks = [block_rows(a, b) for a, b in strip.bounds]
        self.ka, self.kb = blocks[self.rank]
        m = self.m = self.kb - self.ka
        self.counts = np.array([q - p for p, q in blocks], dtype=np.int64)
        self.displs = np.concatenate([[0], np.cumsum(self.counts)[:-1]]).astype(np.int64)
        self.gathered = np.empty(int(self.counts.sum()))
        owners = [r for r, (p, q) in enumerate(blocks) if q > p]
        self.up = self.dn = MPI.PROC_NULL
        if m > 0:
            at = owners.index(self.rank)
            if at > 0:
                self.up = owners[at - 1]
            if at + 1 < len(owners):
                self.dn = owners[at + 1]
        # the classes of the owned blocks in a padded layout of their own: grid rows 2ka .. 2kb - 1 (the
        # last may be the strip's lower halo row, or past the grid's last row: zeros, as the kernel's
        # partial last block in one process)
        a, n, cols = strip.a, strip.n, strip.cols
        fine = np.zeros((2 * m + 2, cols + 2), dtype=strip.cls.dtype)
        lo = 2 * self.ka - a + 1  # the strip's local row of grid row 2ka
        hi = min(2 * self.kb - a + 1, n + 2)
        if hi > lo:
            fine[1 : 1 + hi - lo] = strip.cls[lo:hi]
        shape = (m + 2, coarse_shape(strip.rows, cols)[1])
        self.sq = np.zeros(shape, dtype=np.float32)
        coarse.block_mass(fine, strip.diag, self.sq)
        self._exchange(self.sq)  # the south coupling divides by the mass of the block below
        self.cb = np.zeros(shape, dtype=np.float32)
        self.eb = np.zeros(shape, dtype=np.float32)
        self.sb = np.zeros(shape, dtype=np.float32)
        coarse.block_couplings(fine, strip.table, strip.diag, self.sq, self.cb, self.eb, self.sb)
        del fine
        self._exchange(self.sb)  # a step reads the south coupling of the row above
        self.rows = np.zeros(m + 2)
        self.v = np.zeros(shape)
        coarse.start_vector(self.sq, self.v, self.rows)
        self.norm = math.sqrt(self.all_sum())
        self.w = self.y = self.ritz = None
        self.beta = 0.0
        self.steps = 0
        self.replay = 0
        self.stage = "coarse"
        if self.norm == 0.0:
            self.stage = "done"
            self.release()
            return
        self._scale(self.v, 1.0 / self.norm)
        self.w = np.zeros(shape)

    # --- communication ------------------------------------------------------------------------
    def _exchange(self, arr) -> None:
        """Trade the first and last owned coarse rows of ``arr`` with the neighbouring owners (halo rows 0, m + 1)."""
        m = self.m
        if m == 0:
            return
        c = self.comm
        wait_yielding([c.Irecv(arr[0], source=self.up, tag=TAG_C_DOWN), c.Irecv(arr[m + 1], source=self.dn, tag=TAG_C_UP),
                  c.Isend(arr[1], dest=self.up, tag=TAG_C_UP), c.Isend(arr[m], dest=self.dn, tag=TAG_C_DOWN)])

    def all_sum(self) -> float:
        """The row sums in ``rows`` of every rank, gathered in row order and added exactly rounded (on every rank)."""
        MPI = mpi()
        wait_yielding([self.comm.Iallgatherv(self.rows[1 : self.m + 1], [self.gathered, (self.counts, self.displs), MPI.DOUBLE])])
        return row_sum(self.gathered)

    def _scale(self, arr, factor: float) -> None:
        from relaxtui.kernels import spectral

        spectral.scale_into(arr, factor, arr)

    # --- the stages (the arithmetic of relaxtui.solver.coarse.CoarseLanczos) --------------------
    def _step(self) -> tuple[float, float]:
        k = self._k
        self._exchange(self.v)
        k.apply_step(self.v, self.w, self.beta, self.cb, self.eb, self.sb, self.rows)
        alpha = self.all_sum()
        k.subtract_scaled(self.w, alpha, self.v, self.rows)
        return alpha, math.sqrt(self.all_sum())

    def _shift(self, beta_new: float) -> None:
        self.beta = beta_new
        self._scale(self.w, 1.0 / beta_new)
        self.v, self.w = self.w, self.v

    def _begin_replay(self, ritz: np.ndarray) -> None:
        self.ritz = ritz
        self.w.fill(0.0)
        self._k.start_vector(self.sq, self.v, self.rows)
        self._scale(self.v, 1.0 / self.norm)
        self.beta = 0.0
        self.y = np.zeros(self.v.shape, dtype=np.float32)
        self.replay = 0
        self.stage = "vector"

    def _fine(self):
        """Prolong, smooth, and return on rank 0 the Rayleigh quotient's (numerator, denominator); None elsewhere."""
        k, strip, c = self._k, self.strip, self.comm
        self.v = self.w = None
        self.cb = self.eb = self.sb = None
        y, sq = self.y, self.sq
        a, b, n = strip.a, strip.b, strip.n
        reqs = []
        if a % 2 == 1:  # grid row a is the second row of the block the rank above owns
            reqs += [c.Irecv(y[0], source=self.rank - 1, tag=TAG_Y), c.Irecv(sq[0], source=self.rank - 1, tag=TAG_SQ)]
        if b % 2 == 1 and b < strip.rows:
            reqs += [c.Isend(y[self.m], dest=self.rank + 1, tag=TAG_Y), c.Isend(sq[self.m], dest=self.rank + 1, tag=TAG_SQ)]
        if reqs:
            wait_yielding(reqs)
        x = np.zeros((n + 2, strip.cols + 2), dtype=np.float32)
        k.prolong(y, sq, strip.cls, x, a % 2, 1, n + 1)
        self.y = self.sq = y = sq = None
        strip.exchange(x)
        for _ in range(self.smoothing):
            for colour in (0, 1):
                k.smooth_colour(x, strip.cls, strip.table, (colour + a) & 1)  # the colour of global row a + i
                strip.exchange(x)
        num, den = np.zeros(n + 2), np.zeros(n + 2)
        k.rayleigh(x, strip.cls, strip.table, strip.diag, num, den)
        del x
        mine = np.ascontiguousarray(np.stack([num[1 : n + 1], den[1 : n + 1]], axis=1))
        counts = np.array([2 * (q - p) for p, q in strip.bounds], dtype=np.int64)
        out = None
        if self.rank == 0:
            out = np.empty(int(counts.sum()))
            recv = [out, (counts, np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64)), mpi().DOUBLE]
        else:
            recv = None
        c.Gatherv(mine.ravel(), recv, root=0)
        self.stage = "done"
        if out is None:
            return None
        pairs = out.reshape(-1, 2)
        return row_sum(pairs[:, 0]), row_sum(pairs[:, 1])

    def release(self) -> None:
        self.v = self.w = self.y = None
        self.sq = self.cb = self.eb = self.sb = None
        if getattr(self.strip, "coarse_radius", None) is self:
            self.strip.coarse_radius = None

    def advance(self, decide=None):
        """Stages until rank 0 says stop (collective).

        After each coarse step rank 0 calls ``decide("coarse", (alpha, beta))``, after each replay step
        ``decide("vector", None)`` and after the fine stage ``decide("fine", (num, den))``; it returns
        ``(go_on, coarse_done, ritz)`` (``ritz``: the tridiagonal matrix's top eigenvector when the coarse
        stage has just ended, else None). The decision travels to the other ranks in one broadcast, the
        Ritz coefficients in a second one.
        """
        MPI = mpi()
        msg = np.zeros(2)
        while self.stage != "done":
            stage = self.stage
            coarse_done = False
            if stage == "coarse":
                alpha, beta = self._step()
                self.steps += 1
                info = (alpha, beta)
            else:
                self._k.add_scaled(self.y, float(self.ritz[self.replay]), self.v)
                self.replay += 1
                info = None
                if self.replay >= self.steps:
                    info = self._fine()
                    stage = "fine"
                else:
                    _, beta = self._step()
                    self._shift(beta)
            ritz = None
            if self.rank == 0:
                go_on, coarse_done, ritz = decide(stage, info)
                msg[:] = (float(go_on), float(coarse_done))
            wait_yielding([self.comm.Ibcast(msg, root=0)])
            go_on, coarse_done = bool(msg[0]), bool(msg[1])
            if stage == "coarse":
                if coarse_done:
                    if self.rank != 0:
                        ritz = np.empty(self.steps)
                    wait_yielding([self.comm.Ibcast([ritz, MPI.DOUBLE], root=0)])
                    self._begin_replay(ritz)
                else:
                    self._shift(beta)
            if not go_on:
                break
        if self.stage == "done":
            self.release()


def begin(strip, smoothing: int) -> StripCoarse:
    """Make this rank's share (collective); the kernels are loaded on rank 0 first (a cold cache compiles once)."""
    from relaxtui.parallel.group import warm_in_turn

    if not getattr(strip, "_coarse_warm", False):
        from relaxtui.parallel import stop

        try:
            warm_in_turn(strip.comm, lambda: warm(strip), pause="coarse-warm")
        except stop.Stopped:
            pass  # raised on every rank alike; rank 0's run now cancels at its next step, the kernels load when called
        strip._coarse_warm = True
    strip.coarse_radius = None  # an earlier, unfinished estimate's arrays go first
    state = StripCoarse(strip, smoothing)
    strip.coarse_radius = state if state.stage != "done" else None
    return state


def warm(strip) -> None:
    """Load (or compile) the kernels of the estimate on empty arrays of the strip's types."""
    from relaxtui.kernels import coarse, spectral

    cls = strip.cls[:2]
    f32 = np.zeros((2, 3), dtype=np.float32)
    f64 = np.zeros((2, 3))
    rows = np.zeros(2)
    coarse.block_mass(cls, strip.diag, f32)
    coarse.block_couplings(cls, strip.table, strip.diag, f32, f32, f32, f32)
    coarse.start_vector(f32, f64, rows)
    coarse.apply_step(f64, f64, 0.0, f32, f32, f32, rows)
    coarse.subtract_scaled(f64, 0.0, f64, rows)
    coarse.add_scaled(f32, 0.0, f64)
    x = np.zeros((2, strip.cols + 2), dtype=np.float32)
    coarse.prolong(f32, f32, cls, x, 0, 1, 1)
    coarse.smooth_colour(x, cls, strip.table, 0)
    coarse.rayleigh(x, cls, strip.table, strip.diag, rows, rows)
    spectral.scale_into(f64, 1.0, f64)


class DistributedCoarseLanczos:
    """Rank 0's handle on the two-level estimate across the ranks: the interface of
    :class:`relaxtui.solver.coarse.CoarseLanczos` (``advance``, ``estimate``, ``steps``, ``mu``,
    ``settled``, ``done``, ``max_steps``, ``stage``) with its default settings; every :meth:`advance`
    is one collective command (see :mod:`relaxtui.parallel.group`)."""

    def __init__(self, operator, method_sweeps=None, **options):
        from relaxtui.parallel.group import COARSE_BEGIN

        p = {**coarse_defaults(), **options}
        self.rule = RitzRule(p["min_steps"], p["max_steps"], p["budget"], p["rtol"],
                             method_sweeps if method_sweeps is not None else p["method_sweeps"])
        self.max_steps = self.rule.max_steps
        self.smoothing = int(p["smoothing"])
        self.operator = operator
        self.fine_mu: float | None = None
        self.coarse_mu = 0.0
        with operator.group.collective(COARSE_BEGIN, self.smoothing):
            self.state = begin(operator.strip, self.smoothing)
        if self.state.stage == "done":
            self.rule.settled = self.rule.done = True

    @property
    def steps(self) -> int:
        return self.rule.steps

    @property
    def settled(self) -> bool:
        return self.rule.settled

    @property
    def stage(self) -> str:
        return self.state.stage

    @property
    def done(self) -> bool:
        return self.state.stage == "done"

    @property
    def mu(self) -> float:
        return self.fine_mu if self.fine_mu is not None else self.rule.mu

    def estimate(self) -> RadiusEstimate:
        return RadiusEstimate(self.mu, self.rule.steps, self.rule.settled)

    def work_left(self) -> float:
        """Coarse steps' worth of work still to do at most (the coarse steps to the limit, their replay, the
        fine stage)."""
        s = self.state
        fine = FINE_STEPS_PER_SMOOTHING * self.smoothing
        if s.stage == "coarse":
            return 2 * self.max_steps - self.rule.steps + fine
        if s.stage == "vector":
            return s.steps - s.replay + fine
        return 0.0 if s.stage == "done" else fine

    def _ritz(self) -> np.ndarray:
        # as CoarseLanczos._begin_replay: numpy's eigh on the dense tridiagonal, once
        n = self.rule.steps
        t = np.diag(self.rule.alphas[:n])
        if n > 1:
            off = self.rule.betas[: n - 1]
            t += np.diag(off, 1) + np.diag(off, -1)
        values, vectors = np.linalg.eigh(t)
        self.coarse_mu = float(values[-1])
        return np.ascontiguousarray(vectors[:, -1])

    def release(self) -> None:
        """Free an unfinished estimate's arrays on every rank (collective; it cannot go on afterwards)."""
        from relaxtui.parallel.group import COARSE_RELEASE

        if self.done:
            return  # freed when it finished
        with self.operator.group.collective(COARSE_RELEASE):
            self.state.release()
        self.state.stage = "done"  # nothing is left to advance

    def advance(self, max_new_steps: int | None = None, stop=None, on_step=None) -> bool:
        """As :meth:`relaxtui.solver.coarse.CoarseLanczos.advance`, on every rank."""
        from relaxtui.parallel.group import COARSE_ADVANCE

        new = 0

        def more() -> bool:
            return not (self.done or (stop is not None and stop.is_set())
                        or (max_new_steps is not None and new >= max_new_steps))

        if not more():
            return self.done

        def decide(stage, info):
            nonlocal new
            new += 1
            ritz = None
            done = False
            if stage == "coarse":
                self.rule.record_step(*info)
                done = self.rule.done
                if done:
                    ritz = self._ritz()
                if on_step is not None:
                    on_step(self)
            elif stage == "fine":
                num, den = info
                quotient = num / den if den > 0.0 else 0.0
                # both are lower bounds of the fine radius (Rayleigh quotients): the larger is the better
                self.fine_mu = min(max(quotient, self.rule.mu, 0.0), 1.0 - 1e-16)
            return more() and stage != "fine", done, ritz

        with self.operator.group.collective(COARSE_ADVANCE):
            self.state.advance(decide)
        return self.done
