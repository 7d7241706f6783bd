"""Stop signals across MPI ranks: every rank catches them, the ranks agree when to act.

Every rank installs the single-process handler
(:func:`relaxtui.commands.solve._stop_signals_to`: SIGINT, SIGTERM and SIGHUP
end the run; once the outputs are being written, further signals are noted
and ignored) and registers its state here with :func:`install`. On the
followers a repeated signal is only counted (it never raises inside a
collective); rank 0 acts on it at the next agreement.

A signal is acted upon only where all ranks agree, so that they never part
ways inside a collective:

- :func:`agree` is collective: every rank's first signal and repeat count are
  gathered on every rank (one small non-blocking allgather, waited for
  without spinning); the result (the signal of the lowest rank that has one)
  is the same everywhere and is recorded on every rank's handler state. Rank 0
  calls it between steps of the solve (through the group's check command) and
  the ranks call it between the levels of the multigrid set-up and after the
  kernels are loaded.
- :func:`point` is local: it raises :class:`Stopped` when this rank has a
  signal. It is only for stretches a rank works through alone and that end in
  an agreement (loading or compiling the kernels, rank 0 first, then the others):
  the rank skips the rest of that work, and the agreement that follows stops
  every rank.

A set-up stopped this way raises :class:`Stopped` on every rank at the same
point; rank 0 then ends the run as cancelled and writes the current field
(the starting field when no sweep ran), as a single-process run does.
"""

from __future__ import annotations

import numpy as np

_state = None  # this rank's relaxtui.commands.solve._Signals while a solve runs across ranks
_agreed = 0  # the signal every rank has agreed on (0: none yet)


class Stopped(Exception):
    """The ranks agreed to stop the current set-up phase (a stop signal arrived)."""

    def __init__(self, signum: int):
        super().__init__(f"stopped by signal {signum}")
        self.signum = int(signum)


def install(state) -> None:
    """Register this rank's handler state (None: no solve runs, nothing to agree on)."""
    global _state, _agreed
    _state = state
    _agreed = 0


def local() -> int:
    """The first stop signal this rank received (0: none)."""
    return int(_state.first) if _state is not None and _state.first is not None else 0


def agreed() -> int:
    """The signal the ranks agreed on at the last agreement (0: none); the same on every rank."""
    return _agreed


def point() -> None:
    """Raise :class:`Stopped` if this rank has a stop signal (local: see the module's notes)."""
    signum = local()
    if signum:
        raise Stopped(signum)


def agree(comm, *, raise_stopped: bool = False) -> tuple[int, int]:
    """Collective: (signal, repeats) agreed by every rank of ``comm``.

    ``signal`` is the first stop signal of the lowest rank that has one (0:
    none), ``repeats`` the most signals after the first that any rank received
    while not writing (a repeat asks to stop at once without writing). The
    agreed signal is recorded in this rank's handler state (its event set),
    so rank 0's run sees it as if it had been signalled itself. With
    ``raise_stopped``, a signal raises :class:`Stopped` on every rank.
    """
    from relaxtui.parallel.comm import quiet_wait

    global _agreed
    mine = np.array([local(), int(getattr(_state, "repeated", 0) or 0)], dtype=np.int64)
    parts = np.zeros((comm.Get_size(), 2), dtype=np.int64)
    quiet_wait(comm.Iallgather(mine, parts))
    signalled = parts[parts[:, 0] > 0]
    signum = int(signalled[0, 0]) if len(signalled) else 0
    repeats = int(parts[:, 1].max()) if len(parts) else 0
    if signum:
        _agreed = signum
        if _state is not None and _state.first is None:
            _state.first = signum
            _state.event.set()
    if raise_stopped and signum:
        raise Stopped(signum)
    return signum, repeats


def writing() -> None:
    """The outputs are being written: from now on this rank only notes further signals."""
    if _state is not None:
        _state.writing = True
