"""Kernels against the plain-loop reference (tests/reference.py), sweep by sweep.

Every method x ordering x omega (1 and not 1) x uniform / two-material case,
on small pictures with inside and outside corners, one-cell channels,
isolated fixed cells, flux and convection faces, and rows long enough to
have bulk runs (constant weights) as well as mixed stretches. The reference
builds each cell's equation from the contract's text; agreement is required
to 1e-14 (in practice it is bit for bit).
"""

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import reference
from cases import feature_case, fixed, interior, make_case, outside

from relaxtui.solver.assembled import Operator

HERE = Path(__file__).resolve().parent

CASES = {"uniform": feature_case(False), "two-material": feature_case(True)}
METHODS = [("jacobi", 1.0), ("jacobi", 0.7), ("gauss-seidel", 1.0), ("sor", 1.6), ("sor", 0.8), ("red-black-sor", 1.0), ("red-black-sor", 1.6)]


def with_fixed_values(case, field):
    """A copy of ``field`` with every fixed cell at its region's value."""
    out = field.copy()
    for n, r in enumerate(case.regions):
        if r.kind == "fixed":
            out[case.codes == n] = r.value
    return out


def start_field(case, draw=3):
    """A rough start: interior cells random in [0, 1], fixed cells at their value."""
    rng = np.random.default_rng(draw)
    return rng.random(case.codes.shape)


@pytest.mark.parametrize("name", list(CASES))
@pytest.mark.parametrize("method,omega", METHODS)
def test_sweeps_match_reference(name, method, omega):
    case = CASES[name]
    op = Operator(case)
    assert op.cells_streamed >= op.unknowns
    assert np.any(op.seg_class > 0) and np.any(op.seg_class < 0)  # both bulk runs and mixed stretches are exercised
    init = start_field(case)
    u = op.new_field(init)
    ref = with_fixed_values(case, init)
    updates = np.zeros(4)
    residuals = np.zeros(4)
    for sweep in range(4):
        done = op.sweep(u, method, omega, 1, updates[sweep:], residuals[sweep:])
        assert done == 1
        ref, big_u, big_r = reference.SWEEPS[method](case, ref, omega)
        got = op.finish(u)
        domain = ~np.isnan(got)
        np.testing.assert_allclose(got[domain], ref[domain], rtol=0, atol=1e-14)
        assert updates[sweep] == pytest.approx(big_u, abs=1e-14)
        assert residuals[sweep] == pytest.approx(big_r, abs=1e-14)


@pytest.mark.parametrize("method,omega", METHODS)
def test_many_sweeps_in_one_call_equal_single_calls(method, omega):
    case = CASES["two-material"]
    op = Operator(case)
    a = op.new_field(start_field(case))
    b = a.copy()
    ua, ra = np.zeros(5), np.zeros(5)
    assert op.sweep(a, method, omega, 5, ua, ra) == 5
    ub, rb = np.zeros(5), np.zeros(5)
    for k in range(5):
        op.sweep(b, method, omega, 1, ub[k:], rb[k:])
    assert np.array_equal(a, b)  # odd counts of Jacobi sweeps end in the caller's array too
    assert np.array_equal(ua, ub) and np.array_equal(ra, rb)


@pytest.mark.parametrize("name", list(CASES))
def test_residual_matches_reference(name):
    case = CASES[name]
    op = Operator(case)
    init = start_field(case, draw=11)
    u = op.new_field(init)
    field = with_fixed_values(case, init)
    assert op.residual(u) == pytest.approx(reference.residual(case, field), abs=1e-14)
    rf = op.residual_field(u)
    for (i, j), (w, q) in reference.equations(case).items():
        assert rf[i, j] == pytest.approx(reference._s(field, i, j, w, q) - field[i, j], abs=1e-14)
    interior_cells = np.isin(case.codes, [n for n, r in enumerate(case.regions) if r.kind == "interior"])
    assert np.all(np.isnan(rf[~interior_cells])) and not np.any(np.isnan(rf[interior_cells]))


@pytest.mark.parametrize("nblk", [1, 2, 3, 5, 7])
@pytest.mark.parametrize("omega", [1.0, 1.7])
def test_fused_red_black_is_the_two_pass_schedule_bit_for_bit(nblk, omega):
    """The fused, blocked red-black kernel against the two-pass schedule on the same class table."""
    from relaxtui.kernels import sweeps

    case = CASES["two-material"]
    op = Operator(case)
    u = op.new_field(start_field(case, draw=5))
    v = u.copy()
    upd, res = np.zeros(3), np.zeros(3)
    sweeps.sor_red_black(u, op.cls, op.table, op.row_ptr, op.seg_start, op.seg_end, op.seg_class, omega, 3, upd, res, nblk)
    for k in range(3):
        big = reference.red_black_two_pass(v, op.cls, op.table, omega)
        assert upd[k] == big
    assert np.array_equal(u, v)
    w = op.new_field(start_field(case, draw=5))
    sweeps.sor_red_black_serial(w, op.cls, op.table, op.row_ptr, op.seg_start, op.seg_end, op.seg_class, omega, 3, upd, res)
    assert np.array_equal(w, v)


@pytest.mark.parametrize("nblk", [1, 2, 3])
def test_parallel_jacobi_equals_serial(nblk):
    from relaxtui.kernels import sweeps

    case = CASES["uniform"]
    op = Operator(case)
    a = op.new_field(start_field(case))
    b = a.copy()
    tmp_a, tmp_b = np.zeros_like(a), np.zeros_like(a)
    ua, ra, ub, rb = (np.zeros(3) for _ in range(4))
    sweeps.jacobi(a, tmp_a, op.cls, op.table, op.row_ptr, op.seg_start, op.seg_end, op.seg_class, 0.9, 3, ua, ra, nblk)
    sweeps.jacobi_serial(b, tmp_b, op.cls, op.table, op.row_ptr, op.seg_start, op.seg_end, op.seg_class, 0.9, 3, ub, rb)
    assert np.array_equal(a, b) and np.array_equal(ua, ub) and np.array_equal(ra, rb)


@pytest.mark.parametrize("method", ["jacobi", "gauss-seidel", "sor", "red-black-sor"])
def test_fixed_and_outside_cells_never_change(method):
    case = CASES["two-material"]
    op = Operator(case)
    u = op.new_field(start_field(case))
    before = u.copy()
    omega = 1.0 if method == "gauss-seidel" else 0.9
    op.sweep(u, method, omega, 3, np.zeros(3), np.zeros(3))
    unknown = op.cls != 0
    assert np.array_equal(u[~unknown], before[~unknown])
    assert not np.array_equal(u[unknown], before[unknown])


@pytest.mark.parametrize("method", ["jacobi", "gauss-seidel", "sor", "red-black-sor"])
def test_sweep_stops_after_a_non_finite_update(method):
    case = CASES["uniform"]
    op = Operator(case)
    u = op.new_field()
    u[3, 5] = np.inf  # an interior cell (picture row 2, column 4)
    updates, residuals = np.zeros(6), np.zeros(6)
    omega = 1.0 if method == "gauss-seidel" else 1.2
    assert op.sweep(u, method, omega, 6, updates, residuals) == 1
    assert not np.isfinite(updates[0])
    assert np.all(updates[1:] == 0.0)


def test_many_classes_use_a_wider_class_code():
    """More than 255 classes: uint16 class codes, still the reference's sweeps."""
    rng = np.random.default_rng(7)
    rows, cols = 14, 40
    keys = "abcdefghijkl"
    art = ["H" * cols] + ["#" + "".join(rng.choice(list(keys), cols - 2)) + "#" for _ in range(rows - 2)] + ["#" * cols]
    lg = {ch: interior(f"m{n}", 0.5 + n) for n, ch in enumerate(keys)}
    lg.update({"H": fixed("hot", 2.0), "#": fixed("cold", -1.0)})
    case = make_case(art, lg)
    op = Operator(case)
    assert op.classes > 256 and op.cls.dtype == np.uint16
    u = op.new_field(start_field(case))
    ref = with_fixed_values(case, start_field(case))
    for method, omega in (("red-black-sor", 1.3), ("sor", 1.3), ("jacobi", 1.0)):
        v = u.copy()
        op.sweep(v, method, omega, 1, np.zeros(1), np.zeros(1))
        want, _, _ = reference.SWEEPS[method](case, ref, omega)
        got = op.finish(v)
        domain = ~np.isnan(got)
        np.testing.assert_allclose(got[domain], want[domain], rtol=0, atol=1e-14)


def kernel_numbers() -> dict:
    """Three sweeps of each method on each case, with the residual, the Jacobi product and the flows."""
    out = {}
    for name, case in CASES.items():
        op = Operator(case)
        for method, omega in (("jacobi", 0.8), ("sor", 1.4), ("red-black-sor", 1.4), ("gauss-seidel", 1.0)):
            u = op.new_field(start_field(case))
            upd, res = np.zeros(3), np.zeros(3)
            op.sweep(u, method, omega, 3, upd, res)
            f = op.finish(u)
            x = op.new_field()
            op.jacobi_apply(u, x)
            extra = np.concatenate([np.nan_to_num(op.residual_field(u), nan=-999.0).ravel(), x.ravel()])
            out[f"{name}/{method}"] = [np.nan_to_num(f, nan=-999.0).ravel().tolist() + extra.tolist(), upd.tolist(),
                                       res.tolist(), op.residual(u), op.flows(u)[0]]
    return out


# the same function in a child process with the JIT off (plain Python kernels)
SCRIPT = r"""
import json, sys
sys.path.insert(0, sys.argv[1])
from test_kernels import kernel_numbers
print(json.dumps(kernel_numbers()))
"""


def _run_script(env_extra):
    env = dict(os.environ, **env_extra)
    proc = subprocess.run([sys.executable, "-c", SCRIPT, str(HERE)], capture_output=True, text=True, env=env, timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return json.loads(proc.stdout)


def test_same_results_without_the_jit():
    """NUMBA_DISABLE_JIT=1 runs the kernels as plain Python: the same numbers (and coverage inside kernels)."""
    plain = _run_script({"NUMBA_DISABLE_JIT": "1"})
    # the compiled kernels in this process (one child launch fewer), through JSON like the plain ones
    compiled = json.loads(json.dumps(kernel_numbers()))
    assert plain.keys() == compiled.keys()
    for key in plain:
        f0, u0, r0, res0, fl0 = plain[key]
        f1, u1, r1, res1, fl1 = compiled[key]
        np.testing.assert_allclose(f0, f1, rtol=0, atol=1e-14)
        np.testing.assert_allclose(u0, u1, rtol=0, atol=1e-14)
        np.testing.assert_allclose(r0, r1, rtol=0, atol=1e-14)
        assert res0 == pytest.approx(res1, abs=1e-14)
        for region in fl0:
            assert fl0[region] == pytest.approx(fl1[region], abs=1e-13)


def _random_case(draw, rows=23, cols=57):
    rng = np.random.default_rng(draw)
    # two materials and fixed cells scattered at random, a long uniform band (bulk runs), a fixed row
    pick = rng.choice(list("..bbx"), size=(rows, cols))
    pick[rng.random((rows, cols)) < 0.01] = "H"
    pick[:, 20:45] = "."
    pick[rows // 2, :] = "x"
    lg = {".": interior("plate", 2.0), "b": interior("core", 0.5, source=1.0), "x": fixed("wall", 0.0), "H": fixed("hot", 1.0)}
    return make_case(["".join(r) for r in pick], lg)


@pytest.mark.parametrize("draw", range(4))
def test_segments_cover_every_unknown_once(draw):
    op = Operator(_random_case(draw))
    covered = np.zeros(op.cls.shape, dtype=np.int64)
    for i in range(op.cls.shape[0]):
        for s in range(op.row_ptr[i], op.row_ptr[i + 1]):
            a, e, c = op.seg_start[s], op.seg_end[s], op.seg_class[s]
            assert 1 <= a < e <= op.cls.shape[1] - 1
            covered[i, a:e] += 1
            if c > 0:
                assert e - a >= 16 and np.all(op.cls[i, a:e] == c)  # bulk runs: one class, long enough
            else:
                assert np.any(op.cls[i, a:e] != 0)  # mixed stretches hold an unknown
    assert np.all(covered[op.cls != 0] == 1)
    assert covered.max() <= 1
    assert op.cells_streamed == covered.sum()


@pytest.mark.parametrize("draw", range(6))
def test_group_check_agrees_with_scipy_labelling(draw):
    """The run-based union-find against scipy.ndimage.label (4-connectivity) on random pictures."""
    import scipy.ndimage

    from relaxtui.errors import CaseError

    rng = np.random.default_rng(100 + draw)
    rows, cols = 19, 31
    pick = rng.choice(list("..xx"), size=(rows, cols))
    pick[rng.random((rows, cols)) < 0.004] = "H"
    case = make_case(["".join(r) for r in pick], {".": interior(), "x": outside(), "H": fixed("hot", 1.0)})
    interior_mask = pick == "."
    labels, count = scipy.ndimage.label(interior_mask)  # default structure: 4-connectivity
    anchored = np.zeros(count + 1, dtype=bool)
    hot = pick == "H"
    near_hot = np.zeros_like(hot)
    near_hot[1:] |= hot[:-1]
    near_hot[:-1] |= hot[1:]
    near_hot[:, 1:] |= hot[:, :-1]
    near_hot[:, :-1] |= hot[:, 1:]
    anchored[np.unique(labels[interior_mask & near_hot])] = True
    bad = [g for g in range(1, count + 1) if not anchored[g]]
    if not bad:
        Operator(case)
        return
    # the operator names the group holding the first unanchored cell in image order
    first = min(np.argwhere(np.isin(labels, bad)).tolist())
    size = int((labels == labels[tuple(first)]).sum())
    with pytest.raises(CaseError, match=rf"group of {size} interior cells? \(one (?:of them )?at row {first[0]}, column {first[1]}\)"):
        Operator(case)


@pytest.mark.parametrize("draw", range(3))
@pytest.mark.parametrize("method,omega", [("jacobi", 0.9), ("sor", 1.3), ("red-black-sor", 1.3)])
def test_random_pictures_match_reference(draw, method, omega):
    case = _random_case(draw)
    op = Operator(case)
    init = start_field(case, draw)
    u = op.new_field(init)
    want, big_u, big_r = reference.SWEEPS[method](case, with_fixed_values(case, init), omega)
    upd, res = np.zeros(1), np.zeros(1)
    op.sweep(u, method, omega, 1, upd, res)
    got = op.finish(u)
    domain = ~np.isnan(got)
    np.testing.assert_allclose(got[domain], want[domain], rtol=0, atol=1e-14)
    assert upd[0] == pytest.approx(big_u, abs=1e-14) and res[0] == pytest.approx(big_r, abs=1e-14)


def test_serial_builds_share_the_parallel_source():
    """The one-thread kernels are the parallel kernels' own Python source, built without ``parallel``
    (the agreement of their results is checked by the two tests above)."""
    from relaxtui.kernels import sweeps

    for par, one in ((sweeps.jacobi, sweeps._jacobi_one_thread), (sweeps.sor_red_black, sweeps._sor_red_black_one_thread)):
        if not hasattr(par, "py_func"):  # NUMBA_DISABLE_JIT: plain functions
            assert one.__code__ is par.__code__
            continue
        assert one.py_func.__code__ is par.py_func.__code__
        assert par.targetoptions.get("parallel") and not one.targetoptions.get("parallel")
