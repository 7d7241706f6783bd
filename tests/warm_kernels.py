"""Compile the numba kernels into the disk cache beside the test session.

With a cold cache most of the suite's time is numba compiling kernels, one
at a time, in the pytest process, while the second core waits. conftest.py
starts this script in a child process at the beginning of the session: it
runs every method and output path once on small demo cases, so that numba
writes the compiled kernels to its disk cache (``cache=True``) and the tests
load them instead of compiling them again. numba writes its cache files by
rename, so the two processes never see a half-written entry; a kernel both
reach at once is simply compiled twice.

The order is roughly the reverse of the tests' first use (the pytest process
compiles the early ones itself), so the two processes meet late. This file
asserts nothing: it is a cache warmer, not a test.
"""

from __future__ import annotations

import contextlib
import io
import sys
import tempfile
from pathlib import Path

GRIDS = Path(__file__).resolve().parent.parent / "grids"
METHODS = ("multigrid", "symmetric-sor", "jacobi", "sor", "gauss-seidel", "red-black-sor")


def main() -> int:
    from relaxtui.cli import main as cli

    # first: the float32 build of the report's field summary, which tests/test_field_output.py (early in
    # the session) reaches long before the --precision single solves below
    with contextlib.suppress(Exception):
        from relaxtui.case import load_case
        from relaxtui.solver.assembled import Operator

        op = Operator(load_case(GRIDS / "electrodes.toml"))
        op.field_summary(op.new_field(precision="single"))
    # the uint16 class-code builds of the sweeps (more than 255 classes: tests/test_kernels.py)
    with contextlib.suppress(Exception):
        import numpy as np
        from cases import fixed, interior, make_case  # tests/cases.py, beside this script

        keys = "abcdefghijkl"
        rng = np.random.default_rng(7)
        art = ["H" * 40] + ["#" + "".join(rng.choice(list(keys), 38)) + "#" for _ in range(12)] + ["#" * 40]
        legend = {ch: interior(f"m{n}", 0.5 + n) for n, ch in enumerate(keys)}
        legend.update({"H": fixed("hot", 2.0), "#": fixed("cold", -1.0)})
        op = Operator(make_case(art, legend))
        for method in ("red-black-sor", "sor", "jacobi"):
            op.sweep(op.new_field(), method, 1.3 if method != "jacobi" else 1.0, 1, np.zeros(1), np.zeros(1))
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        for case in ("electrodes", "composite", "power-module", "well-drawdown", "heat-spreader"):
            toml = GRIDS / f"{case}.toml"
            if not toml.exists():
                continue
            for method in METHODS:
                stem = out / f"{case}-{method}"
                argv = ["solve", str(toml), "--method", method, "--max-sweeps", "3", "-q",
                        "--out", f"{stem}.npy", "--report", f"{stem}.json", "--history", f"{stem}.csv",
                        "--picture", f"{stem}.png", "--isolines", "4", "--bundle", f"{stem}.npz"]
                if method == "red-black-sor":  # the starting-field check
                    argv += ["--initial", str(out / f"{case}-multigrid.npy")]
                with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
                    with contextlib.suppress(Exception, SystemExit):
                        cli(argv)
        # the float32 builds of the relaxation kernels (--precision single, tests/test_precision.py)
        toml = GRIDS / "electrodes.toml"
        for method in METHODS[1:] if toml.exists() else ():
            stem = out / f"single-{method}"
            argv = ["solve", str(toml), "--method", method, "--precision", "single", "--max-sweeps", "3", "-q",
                    "--report", f"{stem}.json", "--out", f"{stem}.npy"]
            with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
                with contextlib.suppress(Exception, SystemExit):
                    cli(argv)
        # the two-level radius estimate (large grids; tests/test_coarse_radius.py, the ranks of tests/test_mpi.py)
        toml = GRIDS / "well-drawdown.toml"
        if toml.exists():
            import os

            os.environ["RELAXTUI_COARSE_UNKNOWNS"] = "0"
            argv = ["solve", str(toml), "--method", "red-black-sor", "--max-sweeps", "1", "-q",
                    "--report", str(out / "two-level.json"), "--out", str(out / "two-level.npy")]
            with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
                with contextlib.suppress(Exception, SystemExit):
                    cli(argv)
    return 0


if __name__ == "__main__":
    sys.exit(main())
