"""relaxtui: steady-state field studies on 2-D grids drawn as pictures.

The small Python API::

    import relaxtui
    case = relaxtui.load_case("grids/heat-spreader.toml")
    result = relaxtui.solve(case, method="red-black-sor", omega="auto", tolerance=1e-3)
    result.field      # numpy float64 (rows, cols), NaN outside the domain
    result.report     # dict with the contract's report keys
    result.history    # per-sweep history (sweep, seconds, residual, estimated_error)

Importing this package is cheap: numba is loaded only when a solve starts.
"""

import os as _os

from relaxtui.errors import CaseError, OutputError, RelaxError, UsageError

# Installed, the kernels live in relaxtui/kernels (pyproject maps the top-level
# kernels/ folder there). Run from a source checkout (``python -m relaxtui`` or
# ``python -m pytest`` in the repository root, where the source tree shadows the
# installed package), they are found in the repository's kernels/ instead.
_root = _os.path.dirname(_os.path.dirname(_os.path.abspath(__file__)))
if not _os.path.isdir(_os.path.join(__path__[0], "kernels")) and _os.path.isfile(_os.path.join(_root, "kernels", "__init__.py")):
    __path__.append(_root)

__all__ = ["load_case", "solve", "CaseError", "OutputError", "RelaxError", "UsageError"]


def load_case(path):
    """Load and validate a case TOML file and its picture; see :mod:`relaxtui.case`."""
    from relaxtui.case import load_case as _load

    return _load(path)


def solve(case, **options):
    """Solve a case (a :class:`relaxtui.case.model.Case` or a path); see :func:`relaxtui.solver.driver.solve`."""
    from relaxtui.solver.driver import solve as _solve

    return _solve(case, **options)
