"""Single-precision storage (``--precision single``, ``precision`` in ``[solver]``).

The float64 sweeps these are compared with are themselves held to the plain-loop references of
tests/reference.py (tests/test_methods.py, tests/test_kernels.py); the converged fields are compared
with scipy's spsolve of the independent assembly in tests/exact.py. float32's machine epsilon
2**-23 is IEEE 754's (common practice); the rest are the interfaces of the case-format brief.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from cases import feature_case, model_problem
from exact import exact_solution
from relaxtui.cli import main
from relaxtui.errors import CaseError, UsageError
from relaxtui.options import resolve
from relaxtui.solver import memory
from relaxtui.solver.assembled import Operator
from relaxtui.solver.driver import Run, solve
from test_cli import write_plate

EPS32 = 2.0 ** -23  # float32's machine epsilon (IEEE 754 binary32, common practice)
RELAXATION = ("jacobi", "gauss-seidel", "sor", "red-black-sor", "symmetric-sor")


def _omega(method):
    return 1.0 if method in ("jacobi", "gauss-seidel") else 1.6


@pytest.mark.parametrize("method", RELAXATION)
def test_single_sweeps_follow_the_double_sweeps_to_float32_rounding(method):
    op = Operator(feature_case(True))
    u64 = op.new_field()
    u32 = op.new_field(precision="single")
    assert u32.dtype == np.float32 and u32.shape == u64.shape
    u64[...] = u32  # one starting field, representable in both
    n = 25
    upd64, res64, upd32, res32 = (np.zeros(n) for _ in range(4))
    assert op.sweep(u64, method, _omega(method), n, upd64, res64) == n
    assert op.sweep(u32, method, _omega(method), n, upd32, res32) == n
    scale = float(np.abs(u64).max())
    # each sweep rounds every cell to float32 once (half a unit of roundoff of |u| <= scale); the
    # contraction of a convergent sweep keeps the accumulated difference below one rounding per sweep
    diff = float(np.max(np.abs(u32.astype(np.float64) - u64)))
    assert 0.0 < diff <= n * EPS32 * scale
    assert np.all(np.abs(upd32 - upd64) <= 4 * n * EPS32 * scale + 1e-12 * np.abs(upd64))


def test_one_jacobi_sweep_is_the_double_sweep_rounded_once():
    # Jacobi reads only the old field, so from a float32-representable start the float32 kernel
    # computes the same float64 values and rounds each once on store: exactly float32(u64)
    op = Operator(feature_case(True))
    u32 = op.new_field(precision="single")
    u64 = u32.astype(np.float64)
    upd, res = np.zeros(1), np.zeros(1)
    op.sweep(u64, "jacobi", 0.8, 1, upd, res)
    op.sweep(u32, "jacobi", 0.8, 1, upd, res)
    assert np.array_equal(u32, u64.astype(np.float32))


@pytest.mark.parametrize("method", ("jacobi", "sor", "red-black-sor", "symmetric-sor"))
def test_a_converged_single_run_is_within_tolerance_of_spsolve(method):
    case = model_problem(24, hot=100.0)
    tol = 0.05  # 5e-4 of the field's scale: well above float32's floor on this grid
    result = solve(case, method=method, tolerance=tol, precision="single")
    r = result.report
    assert r["status"] == "converged" and r["precision"] == "single"
    assert result.field.dtype == np.float64  # the exported field stays float64 (case-format.md)
    exact = exact_solution(case)  # tests/exact.py: scipy spsolve of the independent assembly
    assert np.array_equal(np.isnan(result.field), np.isnan(exact))
    assert np.nanmax(np.abs(result.field - exact)) <= tol
    assert r["estimated_error"] <= tol
    # fixed cells are exported at their exact value, not its float32 rounding
    op = Operator(case)
    fixed = op.kind[op.codes] == 1
    assert np.array_equal(result.field[fixed], op.value[op.codes[fixed]])
    # flows are float64 sums over the float32 field: the independent float64 flows of the same
    # (exported) field agree to float64 rounding, not float32's
    from exact import exact_flows

    flows, _, _ = exact_flows(case, result.field)
    top = max(abs(v) for v in flows.values())
    for name, v in r["flows"].items():
        assert abs(v - flows[name]) <= 1e-12 * top


@pytest.mark.parametrize("case_name", ("model", "two-material"))
def test_single_converged_is_a_promise_at_every_tolerance(case_name):
    # over every relaxation method and relative tolerances from 1e-2 to 1e-6: a run that says
    # converged is within its tolerance of spsolve's answer (tests/exact.py); the others are stalled
    case = model_problem(40, hot=100.0) if case_name == "model" else feature_case(True)
    exact = exact_solution(case)
    top = float(np.nanmax(np.abs(exact)))
    converged = 0
    for method in RELAXATION:
        for rel in (1e-2, 1e-3, 1e-4, 1e-6):
            tol = rel * top
            result = solve(case, method=method, tolerance=tol, precision="single")
            status = result.report["status"]
            assert status in ("converged", "stalled"), (method, rel, result.report["message"])
            if status == "converged":
                converged += 1
                assert np.nanmax(np.abs(result.field - exact)) <= tol, (method, rel)
            else:
                assert "float32" in result.report["message"], (method, rel)
    assert converged >= len(RELAXATION) * 2  # single precision does reach the everyday tolerances


@pytest.mark.parametrize("method", ("red-black-sor", "jacobi"))
def test_a_tolerance_below_float32s_floor_ends_stalled_never_converged(method):
    case = model_problem(24, hot=100.0)
    tol = 1e-5  # 1e-7 of the field's scale: below float32's eps times the condition number
    single = solve(case, method=method, tolerance=tol, precision="single", max_sweeps=50_000).report
    assert single["status"] == "stalled", single["message"]
    assert "float32" in single["message"]
    assert single["estimated_error"] > tol
    double = solve(case, method="red-black-sor", tolerance=tol).report  # float64 resolves it
    assert double["status"] == "converged" and double["precision"] == "double"


def test_the_stopping_rule_knows_float32s_epsilon():
    from relaxtui.solver.conditioning import rounding_floor
    from relaxtui.solver.stopping import StoppingRule

    r64 = StoppingRule(1e-3, 100, scale=10.0)
    r32 = StoppingRule(1e-3, 100, scale=10.0, dtype=np.float32)
    assert r64.eps == float(np.finfo(np.float64).eps) and r32.eps == EPS32
    assert r32.float_name == "float32" and r64.float_name == "float64"
    # the attainable accuracy scales with the field's epsilon (conditioning.rounding_floor's model)
    assert math.isclose(rounding_floor(100.0, 10.0, 400, r32.eps) / rounding_floor(100.0, 10.0, 400), EPS32 / r64.eps)


def test_multigrid_in_single_runs_in_double_and_says_so():
    case = model_problem(24, hot=100.0)
    r = solve(case, method="multigrid", tolerance=1e-6, precision="single").report
    assert r["precision"] == "double" and "relaxation methods" in r["precision_note"]
    assert r["status"] == "converged"
    exact = exact_solution(case)  # tests/exact.py
    assert np.nanmax(np.abs(solve(case, method="multigrid", tolerance=1e-6, precision="single").field - exact)) <= 1e-6


# --- options: command line over case over default ---------------------------------------------


def test_resolve_precision_cli_over_case_over_default():
    from relaxtui.case.model import SolverDefaults

    assert resolve({}).precision == "double"
    assert resolve({}, SolverDefaults(precision="single")).precision == "single"
    assert resolve({"precision": "double"}, SolverDefaults(precision="single")).precision == "double"
    assert resolve({"precision": "single"}).precision == "single"
    with pytest.raises(UsageError, match="precision must be one of 'double', 'single'"):
        resolve({"precision": "half"})
    with pytest.raises(UsageError):
        Run(model_problem(4), precision="float16")


def _report(tmp_path, capsys, *extra):
    rep = tmp_path / "r.json"
    code = main(["solve", str(tmp_path / "plate.toml"), "--report", str(rep), "--out", str(tmp_path / "f.npy"),
                 "--tolerance", "0.05", "-q", *extra])
    capsys.readouterr()
    return code, json.loads(rep.read_text())


def test_cli_option_and_toml_key(tmp_path, capsys):
    toml = write_plate(tmp_path)
    code, r = _report(tmp_path, capsys)
    assert code == 0 and r["precision"] == "double"
    code, r = _report(tmp_path, capsys, "--precision", "single")
    assert code == 0 and r["precision"] == "single" and r["status"] == "converged"
    assert np.load(tmp_path / "f.npy").dtype == np.float64
    toml.write_text(toml.read_text().replace("[solver]\n", '[solver]\nprecision = "single"\n'))
    code, r = _report(tmp_path, capsys)
    assert r["precision"] == "single"
    code, r = _report(tmp_path, capsys, "--precision", "double")  # the command line overrides the case
    assert r["precision"] == "double"


def test_bad_precision_is_one_line_and_exit_2(tmp_path, capsys):
    toml = write_plate(tmp_path)
    with pytest.raises(SystemExit) as exc:
        main(["solve", str(toml), "--precision", "half"])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--precision" in err and "'double', 'single'" in err
    toml.write_text(toml.read_text().replace("[solver]\n", '[solver]\nprecision = "half"\n'))
    assert main(["solve", str(toml), "--report", str(tmp_path / "r.json")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "precision" in err and "'double', 'single'" in err and "line" in err
    assert "Traceback" not in err and not (tmp_path / "r.json").exists()
    from relaxtui.case import load_case

    with pytest.raises(CaseError, match=r"\[solver\]: key 'precision' must be one of 'double', 'single'"):
        load_case(toml)


# --- memory ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("method", ("jacobi", "red-black-sor"))
def test_single_halves_the_field_in_the_memory_model(method):
    from relaxtui.solver.methods import METHODS

    rows, cols = 3000, 2000  # an estimate only (nothing allocated); large enough that the decode is not the peak
    padded = (rows + 2) * (cols + 2)
    double = memory.estimate_solve_bytes(rows, cols, method)
    single = memory.estimate_solve_bytes(rows, cols, method, precision="single")
    # the field (8 -> 4 B per padded cell) and, in the sweep phase, each buffer (8 -> 4); the sweep phase
    # (buffers and the radius estimate beside them) and the output phase (the exported float64 copy,
    # 8 B per cell, unchanged) take turns: the larger counts
    b = METHODS[method].buffers
    radius = memory.COARSE_RADIUS_BYTES_PER_CELL * padded
    out = 8 * rows * cols
    assert double - single == 4 * padded + max(8 * b * padded + radius, out) - max(4 * b * padded + radius, out)
    assert double - single >= 4 * padded
    op = Operator(model_problem(30))
    p = op.padded_shape[0] * op.padded_shape[1]
    assert op.memory_bytes(method) - op.memory_bytes(method, "single") == 4 * p * (1 + METHODS[method].buffers)
    # multigrid keeps float64 (it runs in double): no change
    assert memory.estimate_solve_bytes(rows, cols, "multigrid", precision="single") == memory.estimate_solve_bytes(rows, cols, "multigrid")


def test_info_estimate_follows_precision(tmp_path, capsys):
    toml = write_plate(tmp_path)
    assert main(["info", str(toml), "--precision", "single"]) == 0
    out = capsys.readouterr().out
    assert "single precision" in out


def test_sweep_takes_the_precision(tmp_path, capsys):
    toml = write_plate(tmp_path)
    table = tmp_path / "t.csv"
    code = main(["sweep", str(toml), "--methods", "jacobi,red-black-sor", "--precision", "single",
                 "--tolerance", "0.05", "-q", "--csv", str(table)])
    capsys.readouterr()
    rows = table.read_text().strip().splitlines()
    assert len(rows) == 3  # header and one row per method
    statuses = [line.split(",")[6] for line in rows[1:]]
    # 1: not every solve converged (Jacobi's float32 floor on this case is above 5e-4 of its scale)
    assert code == (0 if statuses == ["converged"] * 2 else 1) and set(statuses) <= {"converged", "stalled"}
    with pytest.raises(SystemExit) as exc:
        main(["sweep", str(toml), "--methods", "jacobi", "--precision", "quad"])
    assert exc.value.code == 2 and "'double', 'single'" in capsys.readouterr().err


def test_the_ui_worker_runs_a_single_precision_run(tmp_path):
    # the terminal UI's solve loop (no Textual) with a float32 field: snapshots, history and result
    from relaxtui.tui import worker as w
    from relaxtui.tui.session import Session
    from test_tui import HOT, centre_mean, make_plate
    from test_tui_session import drive, load, start

    loaded = load(tmp_path)
    session = Session()
    rec, run = start(session, loaded, precision="single", tolerance=0.05)
    events = []
    w.solve_loop(rec.id, run, session.control, loaded.layout, events.append)
    drive(session, events)
    assert run.field.dtype == np.float32 and rec.status == "converged"
    assert rec.result.report["precision"] == "single" and rec.result.field.dtype == np.float64
    assert abs(centre_mean(rec.result.field) - HOT / 4) <= 2e-3 + 0.05  # test_tui_session's check, at this tolerance



def test_the_memory_check_follows_the_command_line(tmp_path, capsys, monkeypatch):
    # the loader's check before decoding is made for the precision and method the run will use (the
    # command line over the case's [solver] table), not for the case's own settings
    toml = write_plate(tmp_path)
    toml.write_text(toml.read_text().replace('method = "red-black-sor"', 'method = "jacobi"\nprecision = "double"'))
    seen = []
    real = memory.estimate_solve_bytes

    def spy(rows, cols, method=None, materials=1, per_cell=False, precision="double", fine_radius=False):
        seen.append((method, precision))
        return real(rows, cols, method, materials, per_cell=per_cell, precision=precision, fine_radius=fine_radius)

    monkeypatch.setattr(memory, "estimate_solve_bytes", spy)
    rep = tmp_path / "r.json"
    assert main(["solve", str(toml), "--method", "red-black-sor", "--precision", "single", "-q",
                 "--tolerance", "0.05", "--report", str(rep)]) == 0
    assert seen[0] == ("red-black-sor", "single")
    seen.clear()
    assert main(["solve", str(toml), "-q", "--tolerance", "0.05", "--report", str(rep)]) in (0, 1)
    assert seen[0] == ("jacobi", "double")  # the case's own settings
    seen.clear()
    assert main(["info", str(toml), "--precision", "single"]) == 0
    assert seen[0] == ("jacobi", "single")
    capsys.readouterr()
    # and a refusal names the memory: a multigrid run needs more than the case's Jacobi
    need = real(30, 40, "multigrid", 5)
    assert need > real(30, 40, "jacobi", 5)
    monkeypatch.setattr(memory, "available_bytes", lambda: need - 1)
    assert main(["solve", str(toml), "--method", "multigrid", "-q"]) == 2
    assert "memory is available" in capsys.readouterr().err
