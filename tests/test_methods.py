"""The method registry, the one options path, symmetric SOR and the shared Jacobi-radius estimate."""

from __future__ import annotations

import json
import math
import subprocess
import sys

import numpy as np
import pytest
import reference
from cases import feature_case, model_problem
from exact import exact_solution

from relaxtui import options
from relaxtui.errors import CaseError, UsageError
from relaxtui.solver import radius
from relaxtui.solver.driver import Run, solve
from relaxtui.solver.methods import METHOD_NAMES, METHODS, Stepper
from relaxtui.solver.assembled import Operator

# --- the registry ----------------------------------------------------------------------------


def test_import_cli_loads_no_numpy_numba_or_textual():
    code = ("import sys, relaxtui.cli, relaxtui.options, relaxtui.solver.methods\n"
            "print(sorted(m for m in ('numpy', 'numba', 'textual') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120).stdout
    assert out.strip() == "[]"


def test_every_method_has_one_way_to_advance_a_field():
    for name, m in METHODS.items():
        assert m.name == name and m.short and m.summary
        assert (m.kernel is None) != (m.make is None), name
        assert m.buffers >= 0 and m.bytes_per_cell >= 0
        assert m.auto_note or not m.needs_radius, name  # the report says how auto ω was computed


def test_steppers_follow_the_protocol():
    op = Operator(model_problem(20))
    for name in METHOD_NAMES:
        stepper = METHODS[name].make_stepper(op)
        assert isinstance(stepper, Stepper), name
        u = op.new_field()
        upd, res = np.zeros(3), np.zeros(3)
        assert stepper.sweep(u, METHODS[name].auto(0.9), 3, upd, res) == 3
        stepper.release()


def test_memory_model_reads_the_registry():
    op = Operator(model_problem(20))
    field = 8 * op.padded_shape[0] * op.padded_shape[1]
    base = op.memory_bytes("red-black-sor")
    for name, m in METHODS.items():
        assert op.memory_bytes(name) == base + m.buffers * field


# --- symmetric SOR: the worked example of DEVELOPERS.md ----------------------------------------


@pytest.mark.parametrize("case_name", ["uniform", "two-material"])
@pytest.mark.parametrize("omega", [1.0, 1.4, 0.8])
def test_symmetric_sor_matches_the_plain_loop_reference(case_name, omega):
    # tests/reference.py builds each cell's equation from the contract's text, with none of the operator's tables
    case = feature_case(case_name == "two-material")
    op = Operator(case)
    rng = np.random.default_rng(5)
    init = rng.random(case.codes.shape)
    u = op.new_field(init)
    ref = init.copy()
    for n, r in enumerate(case.regions):
        if r.kind == "fixed":
            ref[case.codes == n] = r.value
    upd, res = np.zeros(1), np.zeros(1)
    for _ in range(3):
        assert op.sweep(u, "symmetric-sor", omega, 1, upd, res) == 1
        ref, big_u, big_r = reference.symmetric_sweep(case, ref, omega)
        got = op.finish(u)
        domain = ~np.isnan(got)
        np.testing.assert_allclose(got[domain], ref[domain], rtol=0, atol=1e-14)
        assert upd[0] == pytest.approx(big_u, abs=1e-14)
        assert res[0] == pytest.approx(big_r, abs=1e-14)


@pytest.mark.parametrize("omega", [1.5, "auto"])
def test_symmetric_sor_solve_is_within_tolerance_of_spsolve(omega):
    # tests/exact.py: the contract's equations assembled independently and solved by scipy's spsolve
    case = feature_case(True)
    exact = exact_solution(case)
    result = solve(case, method="symmetric-sor", omega=omega, tolerance=1e-7)
    assert result.report["status"] == "converged", result.report["message"]
    mask = np.isfinite(exact)
    true_error = float(np.max(np.abs(result.field[mask] - exact[mask])))
    assert true_error <= 1e-7 and result.report["estimated_error"] >= true_error


def test_symmetric_sor_factor_is_below_gauss_seidel_squared_at_its_omega():
    # Young 1971 (from memory): with rho(LU) <= 1/4 (the 5-point Laplacian), SSOR at
    # omega_1 = 2/(1 + sqrt(2(1 - mu))) has factor <= (1 - sqrt((1-mu)/2)) / (1 + sqrt((1-mu)/2)).
    n = 31
    op = Operator(model_problem(n, hot=0.0))
    mu = math.cos(math.pi / (n + 1))  # references.md §9: rho(J) = cos(pi h) on the model problem
    w = METHODS["symmetric-sor"].auto(mu)
    u = op.new_field(np.random.default_rng(1).random(op.shape))
    upd, res = np.zeros(400), np.zeros(400)
    op.sweep(u, "symmetric-sor", w, 400, upd, res)
    measured = (upd[399] / upd[299]) ** (1 / 100)
    s = math.sqrt((1 - mu) / 2)
    assert measured <= (1 - s) / (1 + s) * 1.01


# --- the options path ---------------------------------------------------------------------------


@pytest.mark.parametrize("text,value", [("auto", "auto"), (" AUTO ", "auto"), ("1.5", 1.5), ("1", 1.0)])
def test_parse_omega(text, value):
    assert options.parse_omega(text) == value


@pytest.mark.parametrize("parse,text,words", [
    (options.parse_omega, "2", "omega must lie in (0, 2), got 2"),
    (options.parse_omega, "nan", "omega must lie in (0, 2)"),
    (options.parse_omega, "fast", 'omega must be a number in (0, 2) or "auto"'),
    (options.parse_tolerance, "0", "tolerance must be > 0"),
    (options.parse_tolerance, "inf", "tolerance must be a finite number"),
    (options.parse_tolerance, "abc", "tolerance must be a number"),
    (options.parse_max_sweeps, "0", "max sweeps must be at least 1"),
    (options.parse_max_sweeps, "1e5", "max sweeps must be a whole number"),
    (options.parse_time_limit, "-1", "time limit must be > 0 seconds"),
    (options.parse_method, "newton", "method must be one of jacobi, gauss-seidel, sor, red-black-sor"),
])
def test_one_message_per_error(parse, text, words):
    with pytest.raises(UsageError) as exc:
        parse(text)
    assert words in str(exc.value)


def test_grouped_sweep_counts_are_read():
    assert options.parse_max_sweeps("200 000") == options.parse_max_sweeps("200\u202f000") == 200_000


def test_cli_and_case_file_words_agree(tmp_path, capsys):
    from relaxtui.cli import main

    with pytest.raises(SystemExit):
        main(["solve", str(tmp_path / "x.toml"), "--omega", "2.5"])
    cli_err = capsys.readouterr().err
    assert "omega must lie in (0, 2), got 2.5" in cli_err
    with pytest.raises(UsageError) as exc:
        options.check_omega(2.5, "key 'omega'")
    assert "key 'omega' must lie in (0, 2), got 2.5" == str(exc.value)


def test_resolve_command_line_over_case_over_default():
    from relaxtui.case.model import SolverDefaults

    case = SolverDefaults(method="sor", omega=1.7, tolerance=1e-5, max_sweeps=50)
    assert options.resolve({}, None) == options.Options("red-black-sor", "auto", 1e-3, 200_000, None)
    assert options.resolve({}, case) == options.Options("sor", 1.7, 1e-5, 50, None)
    got = options.resolve({"omega": "1.9", "max_sweeps": 7, "time_limit": 3}, case)
    assert (got.method, got.omega, got.tolerance, got.max_sweeps, got.time_limit) == ("sor", 1.9, 1e-5, 7, 3.0)


def test_omega_with_a_method_without_one():
    from relaxtui.case.model import SolverDefaults

    # given together (on the command line, or both in the case): refused, the same words
    with pytest.raises(UsageError, match="gauss-seidel has no relaxation factor"):
        options.resolve({"method": "gauss-seidel", "omega": 1.5})
    with pytest.raises(UsageError, match="gauss-seidel has no relaxation factor"):
        options.resolve({}, SolverDefaults(method="gauss-seidel", omega=1.5))
    # the case's omega belongs to the case's method: a method chosen on the command line without one leaves it aside
    got = options.resolve({"method": "gauss-seidel"}, SolverDefaults(method="sor", omega=1.5))
    assert got.omega == "auto" and "does not apply to gauss-seidel" in got.note
    assert options.resolve({"method": "gauss-seidel", "omega": 1}).omega == 1.0


def test_case_file_omega_with_gauss_seidel_names_file_and_line(tmp_path):
    from PIL import Image

    from relaxtui.case import load_case

    Image.fromarray(np.array([[[255, 0, 0], [255, 255, 255], [255, 0, 0]]], dtype=np.uint8)).save(tmp_path / "m.png")
    (tmp_path / "c.toml").write_text('mask = "m.png"\n[solver]\nmethod = "gauss-seidel"\nomega = 1.5\n'
                                     '[[region]]\ncolor = "#ffffff"\nkind = "interior"\n'
                                     '[[region]]\ncolor = "#ff0000"\nkind = "fixed"\nvalue = 1\n')
    with pytest.raises(CaseError) as exc:
        load_case(tmp_path / "c.toml")
    assert str(exc.value).startswith(f"{tmp_path / 'c.toml'}:4:")
    assert "gauss-seidel has no relaxation factor" in str(exc.value)


# --- the Jacobi radius: shared, in the background, cached ---------------------------------------


def test_background_estimate_equals_the_one_made_in_place():
    case = model_problem(40)
    a, b = Operator(case).radius_job(), Operator(case).radius_job()
    done = a.run()
    b.start()
    b.pause()  # paused (maybe mid-way), then resumed: Lanczos carries its state over
    b.start()
    b.wait()
    got = b.result()
    # the same steps; the background thread's kernels run on one thread, so its sums round differently
    assert (got.steps, got.settled) == (done.steps, done.settled) and got.mu == pytest.approx(done.mu, abs=1e-12)


def test_radius_is_estimated_once_per_operator():
    case = model_problem(30)
    op = Operator(case)
    first = Run(case, method="sor", omega="auto", operator=op)
    first.prepare()
    steps = op.radius_job().state().steps
    again = Run(case, method="red-black-sor", omega=1.7, operator=op)
    again.prepare()
    assert op.radius_job().state().steps == steps and again.mu == first.mu


@pytest.mark.parametrize("method,omega", [("red-black-sor", 1.9), ("sor", "auto"), ("jacobi", 1.0), ("red-black-sor", "auto")])
def test_solve_stays_honest_while_the_estimate_runs_beside_it(monkeypatch, method, omega):
    # every grid counts as large: the estimate runs in a background thread, the rule measures alone until it lands
    monkeypatch.setattr(radius, "BACKGROUND_UNKNOWNS", 0)
    monkeypatch.setattr("relaxtui.solver.driver.QUICK_RADIUS_STEPS", 5)
    monkeypatch.setattr("relaxtui.solver.driver.BACKGROUND_DELAY_SECONDS", 0.0)
    case = model_problem(63, hot=100.0)
    exact = exact_solution(case)
    result = solve(case, method=method, omega=omega, tolerance=1e-6, max_sweeps=2_000_000)
    rep = result.report
    mask = np.isfinite(exact)
    true_error = float(np.max(np.abs(result.field[mask] - exact[mask])))
    assert rep["status"] == "converged", rep["message"]
    assert true_error <= 1e-6 and rep["estimated_error"] >= true_error  # tests/exact.py: scipy's spsolve
    assert "Lanczos" in rep["omega_note"] or "raised" in rep["omega_note"]


def test_a_run_that_ends_first_says_the_estimate_was_not_ready(monkeypatch):
    monkeypatch.setattr(radius, "BACKGROUND_UNKNOWNS", 0)
    case = model_problem(63, hot=100.0)
    op = Operator(case)
    job = op.radius_job()
    monkeypatch.setattr(job, "start", lambda *a, **k: None)  # never finishes
    run = Run(case, method="red-black-sor", omega=1.9, max_sweeps=5, operator=op)
    while not run.done:
        run.step()
    assert run.status == "sweep-limit"
    assert "was not ready" in run.omega_note and run.rule.prior_factor is None


def test_a_short_run_with_a_given_omega_does_not_start_the_estimate(monkeypatch):
    monkeypatch.setattr(radius, "BACKGROUND_UNKNOWNS", 0)
    monkeypatch.setattr("relaxtui.solver.driver.BACKGROUND_DELAY_SECONDS", 1e9)
    case = model_problem(63, hot=100.0)
    op = Operator(case)
    run = Run(case, method="red-black-sor", omega=1.9, max_sweeps=30, operator=op)
    while not run.done:
        run.step()
    assert op.radius_job().state().stage == "not started" and "not started: a short run sweeps at full speed" in run.omega_note


def test_radius_cache_round_trip_and_corrupt_files(tmp_path):
    case = model_problem(30)
    op = Operator(case)
    job = op.radius_job()
    est = job.run(lambda mu: 1e9)  # enough budget to settle
    path = radius.cache_path(tmp_path, op)
    assert est.settled and job.save(path)
    fresh = Operator(case).radius_job()
    assert fresh.load(path) and fresh.result() == est and fresh.state().source == "cache"
    other = Operator(model_problem(31)).radius_job()
    assert not other.load(path)  # another operator's hash
    for junk in (b"", b"{", b"\xff\xfe", json.dumps({"version": 1, "operator": op.fingerprint(), "mu": "x", "steps": 1,
                                                      "settled": True}).encode(), b"[1, 2]"):
        path.write_bytes(junk)
        again = Operator(case).radius_job()
        assert not again.load(path) and again.result() is None


# --- the time limit covers the set-up --------------------------------------------------------------


def test_time_limit_counts_the_set_up():
    case = model_problem(60)
    run = Run(case, method="red-black-sor", omega=1.5, tolerance=1e-12, time_limit=1e-9)
    while not run.done:
        run.step()
    assert run.status == "time-limit" and run.rule.sweeps >= 1  # one chunk, then the limit (set-up alone exceeds it)
    assert run.prepare_seconds > run.time_limit


def test_a_set_up_cut_by_the_time_limit_says_so(monkeypatch):
    case = model_problem(60)
    op = Operator(case)
    monkeypatch.setattr(op.radius_job(), "start", lambda *a, **k: None)  # the rest of the estimate never lands
    run = Run(case, method="sor", omega="auto", tolerance=1e-12, time_limit=1e-9, operator=op)
    run.prepare()
    assert "cut to 0 s by the time limit" in run.omega_note and run.omega < 2.0
    while not run.done:
        run.step()
    assert run.status == "time-limit" and "was not ready" in run.omega_note



def test_jacobi_chunks_are_even_so_no_sweep_ends_with_a_copy_back():
    # Jacobi alternates two buffers; an odd number of sweeps in one call costs a copy of the field
    # back into the working array (an extra pass), so the driver asks for even chunks. The field is
    # the same either way: after 41 sweeps it is the plain-loop reference's (tests/reference.py,
    # the contract's Jacobi update cell by cell) to rounding.
    case = model_problem(24)
    run = Run(case, method="jacobi", omega=1.0, tolerance=1e-12, max_sweeps=41)
    run.prepare()
    asked = []
    real = run.operator.sweep

    def spy(u, method, omega, sweeps, updates, residuals):
        asked.append(sweeps)
        return real(u, method, omega, sweeps, updates, residuals)

    run.operator.sweep = spy
    while not run.done:
        run.step(0.05)
    assert sum(asked) == 41 and all(n % 2 == 0 for n in asked[:-1]), asked  # the last: what is left
    op = Operator(case)
    v = op.view(op.new_field()).copy()
    for _ in range(41):
        v = reference.jacobi_sweep(case, v, 1.0)[0]
    interior = op.cls[1:-1, 1:-1] > 0
    assert np.allclose(op.view(run.field)[interior], v[interior], rtol=0, atol=1e-13)
