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

from relaxtui.errors import CaseError, OutputError, RelaxError, UsageError

__all__ = ["load_case", "solve", "CaseError", "OutputError", "RelaxError", "UsageError"]


def load_case(path):
    """Load and validate a case TOML file and its picture; see :mod:`relaxtui.case`."""
    from relaxtui.case import load_case as _load

    return _load(path)


def solve(case, **options):
    """Solve a case (a :class:`relaxtui.model.Case` or a path); see :func:`relaxtui.driver.solve`."""
    from relaxtui.driver import solve as _solve

    return _solve(case, **options)
