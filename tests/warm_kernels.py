"""Compile the numba kernels into the disk cache beside the test session.

With a cold cache most of the suite's time is numba compiling kernels, one
at a time, in the pytest process, while the second core waits. conftest.py
starts this script in a child process at the beginning of the session: it
runs every method and output path once on small demo cases, so that numba
writes the compiled kernels to its disk cache (``cache=True``) and the tests
load them instead of compiling them again. numba writes its cache files by
rename, so the two processes never see a half-written entry; a kernel both
reach at once is simply compiled twice (wasted: both pay its full compile).

The two processes work in lanes so that they rarely meet (conftest.py orders
the test files to match, see ``EARLY`` and ``LATE`` there):

1. the operator's assembly kernels, while the tests that call no kernel run;
2. multigrid, the costliest family (its restriction and Galerkin kernels alone
   are about 45 s of one core), then the uint16 class-code builds, the float32
   ones (``--precision single``), the strip kernels the MPI ranks load and the
   two-level radius estimate: what the late test files need;
3. meanwhile the test process compiles the float64 relaxation sweeps and
   measures itself, in the default group of files. This script no longer
   runs every method and output on the demos after lane 2: what those 30
   solves compile on their own (the float64 sweeps) the tests compiled 70 to
   145 s into a cold session (2026-12-03, load 1-2.5), long before the
   warmer got there, so they only loaded kernels beside tests/test_mpi.py.

This file asserts nothing: it is a cache warmer, not a test.
"""

from __future__ import annotations

import contextlib
import io
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

GRIDS = Path(__file__).resolve().parent.parent / "grids"
METHODS = ("multigrid", "symmetric-sor", "jacobi", "sor", "gauss-seidel", "red-black-sor")


@contextlib.contextmanager
def quietly():
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        with contextlib.suppress(Exception, SystemExit):
            yield


def cli(argv) -> None:
    from relaxtui.cli import main

    with quietly():
        main([str(a) for a in argv])


def many_classes_case():
    """More than 255 classes (uint16 class codes), as in tests/test_kernels.py."""
    import numpy as np
    from cases import fixed, interior, make_case  # tests/cases.py, beside this script

    keys = "abcdefghijkl"
    rng = np.random.default_rng(7)
    art = ["H" * 40] + ["#" + "".join(rng.choice(list(keys), 38)) + "#" for _ in range(12)] + ["#" * 40]
    legend = {ch: interior(f"m{n}", 0.5 + n) for n, ch in enumerate(keys)}
    legend.update({"H": fixed("hot", 2.0), "#": fixed("cold", -1.0)})
    return make_case(art, legend)


def mpi_launches(out: Path) -> None:
    """The kernels the ranks of tests/test_mpi.py load: 2-rank solves of a uint8 demo, one per distributed method,
    and red-black SOR on a uint16 demo (its probes test; no test runs Jacobi or multigrid on uint16 class codes
    under mpiexec; the six launches of both demos took the warmer 46 s cold, load about 1). Rank 0 compiles, the other rank then loads
    (relaxtui.parallel.group.warm_in_turn)."""
    try:
        import mpi4py  # noqa: F401
    except ImportError:
        return
    exe = shutil.which("mpiexec", path=str(Path(sys.executable).parent)) or shutil.which("mpiexec")
    if exe is None:
        return
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PMI_", "PMIX_", "HYDRA_", "MPIR_", "OMPI_", "I_MPI_"))}
    env["NUMBA_NUM_THREADS"] = "1"  # as the test's launches
    for case, methods in (("electrodes", ("jacobi", "red-black-sor", "multigrid")), ("well-drawdown", ("red-black-sor",))):
        for method in methods:
            stem = out / f"mpi-{case}-{method}"
            cmd = [exe, "-n", "2", sys.executable, "-m", "relaxtui", "solve", str(GRIDS / f"{case}.toml"), "--method", method,
                   "--max-sweeps", "2", "-q", "--out", f"{stem}.npy", "--report", f"{stem}.json"]
            with contextlib.suppress(Exception):
                subprocess.run(cmd, cwd=out, env=env, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                               stderr=subprocess.DEVNULL, timeout=600)  # in the warmer's process group (conftest.py)


def main() -> int:
    import numpy as np

    # lane 1: the assembly kernels every operator needs, and the domain check's labelling (tests/test_case.py)
    with quietly():
        from relaxtui.case import load_case
        from relaxtui.kernels import labels
        from relaxtui.solver.assembled import Operator

        electrodes = Operator(load_case(GRIDS / "electrodes.toml"))
        electrodes.new_field()
        labels.label4(np.zeros((2, 2), dtype=bool))
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        # lane 2: multigrid on a large (row blocks in parallel) and a small demo, then with uint16 class codes
        for case in ("electrodes", "power-module", "well-drawdown"):
            stem = out / f"mg-{case}"
            cli(["solve", GRIDS / f"{case}.toml", "--method", "multigrid", "--max-sweeps", "3", "-q",
                 "--out", f"{stem}.npy", "--report", f"{stem}.json"])
        # the uint16 class-code builds of the sweeps (more than 255 classes: tests/test_kernels.py)
        with quietly():
            op = Operator(many_classes_case())
            for method in ("red-black-sor", "sor", "jacobi", "symmetric-sor"):
                op.sweep(op.new_field(), method, 1.3 if method != "jacobi" else 1.0, 1, np.zeros(1), np.zeros(1))
            op.residual(op.new_field())
        # the float32 builds (--precision single: tests/test_field_output.py, tests/test_precision.py)
        with quietly():
            electrodes.field_summary(electrodes.new_field(precision="single"))
        # on the small demo only: every single-precision solve of the tests is below assembled.PARALLEL_CELLS, so
        # the row-block float32 builds that the larger demo compiled (13 s cold, load about 1) were never loaded
        for case in ("power-module",):
            for method in METHODS[1:]:
                stem = out / f"single-{case}-{method}"
                cli(["solve", GRIDS / f"{case}.toml", "--method", method, "--precision", "single", "--max-sweeps", "3", "-q",
                     "--report", f"{stem}.json", "--out", f"{stem}.npy"])
        # the strip kernels of the MPI ranks (tests/test_mpi.py, late in the session)
        mpi_launches(out)
        # the two-level radius estimate (large grids; tests/test_coarse_radius.py, the ranks of tests/test_mpi.py):
        # uint8 class codes only, as in every test that takes that path (its uint16 builds cost the warmer 7 s)
        os.environ["RELAXTUI_COARSE_UNKNOWNS"] = "0"
        for case in ("power-module",):
            cli(["solve", GRIDS / f"{case}.toml", "--method", "red-black-sor", "--max-sweeps", "1", "-q",
                 "--report", out / f"two-level-{case}.json", "--out", out / f"two-level-{case}.npy"])
        del os.environ["RELAXTUI_COARSE_UNKNOWNS"]
    return 0


if __name__ == "__main__":
    sys.exit(main())
