"""The one options path: parse, validate and resolve a solve's options.

Method, ω, tolerance, sweep limit and time limit are checked here and only
here, with one message per error. Every entry point uses it:

* the command line: argparse ``type=`` callables wrap the ``parse_*`` functions
  (:func:`argparse_type`), so a bad option reads the same as everywhere else;
* the case loader: the ``check_*`` twins take the values TOML typed, with the
  subject ``key 'omega'`` etc.; the loader puts file and line in front;
* the terminal UI's fields: the ``parse_*`` functions;
* the driver and the Python API: :func:`resolve`, which applies
  *command line (or call arguments) over the case's [solver] table over the
  defaults* and checks that ω applies to the method.

ω and methods without a relaxation factor (Gauss-Seidel). An ω given *together
with* such a method (both on the command line, or both in the same [solver]
table) is an error, wherever it is given. A case's ω is a default for the
case's method: when the command line picks another method without ω, the case's
ω does not apply to it and is left aside (the run's ω note says so).

Pure Python (no numpy): ``relaxtui --help`` imports this module.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from relaxtui.errors import UsageError

DEFAULT_METHOD = "red-black-sor"
DEFAULT_OMEGA = "auto"
DEFAULT_TOLERANCE = 1e-3
DEFAULT_MAX_SWEEPS = 200_000
DEFAULT_PRECISION = "double"
PRECISIONS = ("double", "single")  # the working field's storage: float64 or float32 (issue 14, case format v1.1)

_GROUPING = (" ", "\u202f", "\u2009", "\u00a0", "_")  # thousands separators accepted in a typed sweep count


def type_name(value) -> str:
    """How a message names the type of a value read from the command line or a TOML file."""
    from datetime import date, datetime, time

    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a float"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, (list, tuple)):
        return "an array"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, (datetime, date, time)):
        return "a date/time"
    return f"a {type(value).__name__}"


def show_value(value) -> str:
    """A value as a message quotes it: true/false, %g floats, quoted strings."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{value:g}"
    if isinstance(value, str):
        return repr(value)
    return str(value)


_type_name, _show = type_name, show_value


def _is_number(value) -> bool:
    if isinstance(value, bool):
        return False
    if isinstance(value, (int, float)):
        return True
    # numpy scalars and the like, without importing numpy
    return hasattr(value, "__float__") and type(value).__module__ == "numpy" and getattr(value, "ndim", 1) == 0


# --- methods --------------------------------------------------------------------------------


def method_names() -> tuple[str, ...]:
    from relaxtui.solver.methods import METHOD_NAMES

    return METHOD_NAMES


def _suggestion(text: str, names) -> str:
    import difflib

    close = difflib.get_close_matches(text, list(names), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


def _one_of(value, names, subject: str, shown: str, kind: str = "a string") -> str:
    """``value`` if it is one of ``names`` (shown in messages as ``shown``), else :class:`UsageError`."""
    if not isinstance(value, str):
        raise UsageError(f"{subject} must be {kind}, not {_type_name(value)} ({_show(value)})")
    if value not in names:
        raise UsageError(f"{subject} must be one of {shown}; got {value!r}{_suggestion(value, names)}")
    return value


def check_method(value, subject: str = "method") -> str:
    """A method name, or :class:`UsageError` naming the known ones."""
    names = method_names()
    return _one_of(value, names, subject, ", ".join(names))


def parse_method(text: str, subject: str = "method") -> str:
    return check_method(text.strip() if isinstance(text, str) else text, subject)


# --- ω ----------------------------------------------------------------------------------------


def _omega_range(value: float, subject: str) -> float:
    if not (0.0 < value < 2.0):  # NaN fails too
        raise UsageError(f"{subject} must lie in (0, 2), got {_show(value)}")
    return value


def check_omega(value, subject: str = "omega"):
    """A typed ω: a number in (0, 2) (returned as float) or the string ``"auto"``."""
    if isinstance(value, str):
        if value.strip().lower() == "auto":
            return "auto"
        raise UsageError(f"{subject} must be a number in (0, 2) or \"auto\", not {value!r}")
    if not _is_number(value):
        raise UsageError(f"{subject} must be a number, not {_type_name(value)} ({_show(value)})")
    return _omega_range(float(value), subject)


def parse_omega(text: str, subject: str = "omega"):
    """Typed text: ``auto`` (any case) or a number in (0, 2)."""
    if not isinstance(text, str):
        return check_omega(text, subject)
    stripped = text.strip()
    if stripped.lower() == "auto":
        return "auto"
    try:
        value = float(stripped)
    except ValueError:
        raise UsageError(f"{subject} must be a number in (0, 2) or \"auto\", not {text!r}") from None
    return _omega_range(value, subject)


def check_omega_for(method: str, omega, subject: str = "omega"):
    """ω (checked) where it applies to ``method``: a method without ω takes only 1 or ``auto``."""
    from relaxtui.solver.methods import get_method

    omega = check_omega(omega, subject)
    if omega != "auto" and not get_method(method).has_omega and omega != 1.0:
        raise UsageError(f"{method} has no relaxation factor (omega must be 1); use sor or red-black-sor for omega {omega:g}")
    return omega


# --- tolerance, sweep limit, time limit ----------------------------------------------------------


def _positive(value, subject: str, unit: str = "") -> float:
    if not _is_number(value):
        raise UsageError(f"{subject} must be a number, not {_type_name(value)} ({_show(value)})")
    x = float(value)
    if not math.isfinite(x):
        raise UsageError(f"{subject} must be a finite number, got {_show(value)}")
    if not x > 0.0:
        raise UsageError(f"{subject} must be > 0{unit}, got {_show(value)}")
    return x


def _parse_float(text, subject: str) -> float:
    if not isinstance(text, str):
        return text
    try:
        return float(text.strip())
    except ValueError:
        raise UsageError(f"{subject} must be a number, not {text!r}") from None


def check_tolerance(value, subject: str = "tolerance") -> float:
    """The largest error accepted: a finite number > 0."""
    return _positive(value, subject)


def parse_tolerance(text: str, subject: str = "tolerance") -> float:
    return check_tolerance(_parse_float(text, subject), subject)


def check_time_limit(value, subject: str = "time limit") -> float:
    """Seconds: a finite number > 0."""
    return _positive(value, subject, " seconds")


def parse_time_limit(text: str, subject: str = "time limit") -> float:
    return check_time_limit(_parse_float(text, subject), subject)


def check_max_sweeps(value, subject: str = "max sweeps") -> int:
    """A whole number >= 1 (an integral float is not one: ``1e5`` is refused)."""
    if isinstance(value, bool) or not (isinstance(value, int) or (_is_number(value) and type(value).__name__.startswith(("int", "uint")))):
        raise UsageError(f"{subject} must be a whole number, not {_type_name(value)} ({_show(value)})")
    value = int(value)
    if value < 1:
        raise UsageError(f"{subject} must be at least 1, got {value}")
    return value


def parse_max_sweeps(text: str, subject: str = "max sweeps") -> int:
    """Typed digits; spaces, thin spaces and underscores between digit groups are allowed."""
    if not isinstance(text, str):
        return check_max_sweeps(text, subject)
    digits = text.strip()
    for sep in _GROUPING:
        digits = digits.replace(sep, "")
    try:
        value = int(digits)
    except ValueError:
        raise UsageError(f"{subject} must be a whole number, not {text!r}") from None
    return check_max_sweeps(value, subject)


# --- precision -------------------------------------------------------------------------------


def check_precision(value, subject: str = "precision") -> str:
    """The working field's storage: ``"double"`` (float64) or ``"single"`` (float32)."""
    shown = ", ".join(map(repr, PRECISIONS))
    return _one_of(value, PRECISIONS, subject, shown, f"one of {shown}")


def parse_precision(text: str, subject: str = "precision") -> str:
    return check_precision(text.strip().lower() if isinstance(text, str) else text, subject)


# --- argparse ------------------------------------------------------------------------------------


def argparse_type(parse, subject: str | None = None):
    """``type=`` callable for argparse: ``parse`` with its UsageError turned into argparse's error
    (argparse prints ``argument --omega: <the same message>`` and exits 2)."""

    def convert(text):
        import argparse

        try:
            return parse(text) if subject is None else parse(text, subject)
        except UsageError as exc:
            raise argparse.ArgumentTypeError(str(exc)) from None

    convert.__name__ = getattr(parse, "__name__", "value").replace("parse_", "")
    return convert


# --- resolving -----------------------------------------------------------------------------------


@dataclass(frozen=True)
class Options:
    """A solve's resolved options."""

    method: str
    omega: float | str  # a number in (0, 2) or "auto"
    tolerance: float
    max_sweeps: int
    time_limit: float | None = None
    note: str = ""  # what resolving left aside (a case's ω that does not apply to the method chosen)
    precision: str = DEFAULT_PRECISION  # "double" or "single": the working field's storage


KEYS = ("method", "omega", "tolerance", "max_sweeps", "time_limit", "precision")
CASE_KEYS = ("method", "omega", "tolerance", "max_sweeps", "precision")  # the keys a [solver] table may give


def resolve(cli: dict | None = None, case_solver=None) -> Options:
    """Command line (or call arguments) over the case's ``[solver]`` table over the defaults.

    Parameters
    ----------
    cli : dict
        Any of ``method``, ``omega``, ``tolerance``, ``max_sweeps``,
        ``time_limit``, ``precision``; ``None`` (or a missing key) means "not given". Values
        may be typed or text (text goes through the ``parse_*`` functions).
    case_solver : relaxtui.case.model.SolverDefaults or None
        The case's table (its ``None`` fields are silent).

    Raises
    ------
    UsageError
        A value out of range, or an ω given with a method that has none.
    """
    cli = dict(cli or {})
    unknown = set(cli) - set(KEYS)
    if unknown:
        raise UsageError(f"unknown solver option {sorted(unknown)[0]!r}; the options are {', '.join(KEYS)}")
    case = {k: getattr(case_solver, k, None) for k in CASE_KEYS} if case_solver is not None else {}

    def pick(key):
        if cli.get(key) is not None:
            return cli[key], "cli"
        if case.get(key) is not None:
            return case[key], "case"
        return None, "default"

    method, method_from = pick("method")
    method = parse_method(method) if method is not None else DEFAULT_METHOD
    omega, omega_from = pick("omega")
    note = ""
    if omega is None:
        omega = DEFAULT_OMEGA
    else:
        omega = parse_omega(omega)
    from relaxtui.solver.methods import get_method

    if omega != "auto" and not get_method(method).has_omega and omega != 1.0:
        if omega_from == "case" and method_from == "cli":
            # the case's ω belongs to the case's method; the method chosen on the command line has none
            note = f"the case's omega {omega:g} does not apply to {method}"
            omega = "auto"
        else:
            check_omega_for(method, omega)  # raises: the same words as on the command line
    tolerance, _ = pick("tolerance")
    tolerance = parse_tolerance(tolerance) if tolerance is not None else DEFAULT_TOLERANCE
    max_sweeps, _ = pick("max_sweeps")
    max_sweeps = parse_max_sweeps(max_sweeps) if max_sweeps is not None else DEFAULT_MAX_SWEEPS
    time_limit = cli.get("time_limit")
    time_limit = parse_time_limit(time_limit) if time_limit is not None else None
    precision, _ = pick("precision")
    precision = parse_precision(precision) if precision is not None else DEFAULT_PRECISION
    return Options(method, omega, tolerance, max_sweeps, time_limit, note, precision)
