"""The report's numbers read from the working array, and the .npy written in strips.

References, outside the code under test: a plain numpy computation on the whole exported field
(numpy's argmin/argmax over the finite cells, first occurrence on ties; relaxtui.output.flux.flux,
the whole-grid numpy flux that tests/test_export.py checks against Fourier's law on linear fields),
numpy.save / numpy.load for the file format, and hashlib for the SHA-256 of the file's bytes.
"""

from __future__ import annotations

import hashlib
import io
import json
import os

import numpy as np
import pytest
from cases import convection, feature_case, fixed, flux, interior, make_case, outside

from relaxtui.output import flux as flux_module
from relaxtui.output.atomic import OutputSet, write_field_npy
from relaxtui.solver.assembled import Operator
from relaxtui.solver.driver import Run, solve

LEGEND = {"H": fixed("hot", 1.0), "C": fixed("cold", 0.0, conductivity=3.0), ".": interior(),
          "a": interior("alloy", conductivity=5.0), "x": outside(), "f": flux("heater", 2.0),
          "c": convection("air", 2.0, 0.5)}
ART = ["HHHHHHHHHHHH",
       "H..x....aaaC",
       "H..x....aa.C",
       "f.....xx...C",
       "f..aa......C",
       "HccccccccccH"]


def numpy_reference(field, case):
    """(min, (row, col), max, (row, col)) over the finite cells and (|q|, qx, qy, row, col) of the
    largest finite flux magnitude, both first in row-major order on ties, from the whole field."""
    values = np.where(np.isfinite(field), field, np.nan)
    lo = hi = None
    if np.isfinite(values).any():
        i_min = int(np.argmin(np.where(np.isfinite(values), values, np.inf)))
        i_max = int(np.argmax(np.where(np.isfinite(values), values, -np.inf)))
        cols = field.shape[1]
        lo = (float(field.flat[i_min]), divmod(i_min, cols))
        hi = (float(field.flat[i_max]), divmod(i_max, cols))
    with np.errstate(invalid="ignore"):  # inf - inf next to a diverged cell: NaN, skipped below
        qx, qy = flux_module.flux(field, case)
    mag = np.hypot(qx, qy)
    finite = np.isfinite(mag)
    peak = None
    if finite.any():
        mag[~finite] = -1.0
        r, c = divmod(int(np.argmax(mag)), field.shape[1])
        peak = (float(mag[r, c]), float(qx[r, c]), float(qy[r, c]), r, c)
    return lo, hi, peak


def check_summary(op, u):
    field = op.finish(u)
    lo, hi, peak = numpy_reference(field, op.case)
    ext, got = op.field_summary(u)
    if lo is None:
        assert ext["min"] is None and ext["max"] is None
    else:
        assert (ext["min"], (ext["min_at"]["row"], ext["min_at"]["col"])) == lo
        assert (ext["max"], (ext["max_at"]["row"], ext["max_at"]["col"])) == hi
    if peak is None:
        assert got["value"] == 0.0 and got["row"] is None
    else:  # the same floating-point operations in the same order: equal, not close
        assert (got["value"], got["qx"], got["qy"], got["row"], got["col"]) == peak


def random_field(op, draw, dtype=np.float64):
    u = op.new_field(precision="single" if dtype == np.float32 else "double")
    inner = op.view(u)
    interior_cells = op.cls[1:-1, 1:-1] != 0
    rng = np.random.default_rng(draw)
    inner[interior_cells] = rng.normal(size=int(interior_cells.sum())).astype(dtype)
    return u


@pytest.mark.parametrize("draw", [0, 1, 2])
@pytest.mark.parametrize("cell_size", [1.0, 0.037])
def test_field_summary_is_the_numpy_computation_on_the_exported_field(draw, cell_size):
    # fixed regions with and without their own conductivity (the latter: the mean of its interior
    # neighbours'), two materials, holes, flux and convection cells (outside the domain: NaN)
    op = Operator(make_case(ART, LEGEND, cell_size=cell_size))
    check_summary(op, random_field(op, draw))


def test_field_summary_of_a_single_precision_field():
    op = Operator(make_case(ART, LEGEND))
    check_summary(op, random_field(op, 5, np.float32))


def test_field_summary_skips_what_is_not_finite_and_keeps_the_first_tie():
    op = Operator(make_case(ART, LEGEND))
    u = op.new_field()
    op.view(u)[op.cls[1:-1, 1:-1] != 0] = 0.25  # a constant interior: min and max tie many times
    check_summary(op, u)
    u = random_field(op, 7)
    inner = op.view(u)
    inner[2, 2], inner[3, 5], inner[4, 9] = np.inf, np.nan, -np.inf  # a diverging run
    check_summary(op, u)


@pytest.mark.parametrize("art", [["H...C"], ["H", ".", ".", "C"], ["x.x", "H.C"]])
def test_field_summary_on_thin_grids(art):
    op = Operator(make_case(art, LEGEND))
    check_summary(op, random_field(op, 3))


def test_a_run_builds_no_exported_field_until_asked(tmp_path):
    case = feature_case(True)
    run = Run(case, tolerance=1e-6)
    while not run.done:
        run.step()
    result = run.result()
    assert result.export is not None and result._field is None  # the report did not need one
    field = result.field
    assert result.export is None  # made once, then the working array is not referenced
    np.testing.assert_array_equal(field, run.operator.finish(run.field))
    lo, hi, peak = numpy_reference(field, case)
    r = result.report
    assert (r["min"], r["max"]) == (lo[0], hi[0])
    assert (r["flux_max"]["value"], r["flux_max"]["row"], r["flux_max"]["col"]) == (peak[0], peak[3], peak[4])


def fill_from(array):
    def fill(a, b, out):
        out[...] = array[a:b]
        return out

    return fill


@pytest.mark.parametrize("shape,strip_bytes", [((37, 11), 8 * 11 * 5), ((37, 11), 8 * 11 * 37), ((3, 1000), 100),
                                               ((1, 1), 8), ((0, 4), 64)])
def test_streamed_npy_is_the_file_numpy_writes(tmp_path, shape, strip_bytes):
    rng = np.random.default_rng(11)
    array = rng.normal(size=shape)
    if array.size:
        array.flat[:: 7] = np.nan
    target = tmp_path / "f.npy"
    digest = write_field_npy(target, shape, fill_from(array), strip_bytes=strip_bytes)
    data = target.read_bytes()
    reference = io.BytesIO()
    np.save(reference, array, allow_pickle=False)  # numpy's own writer: the same bytes
    assert data == reference.getvalue()
    np.testing.assert_array_equal(np.load(target), array)
    assert digest == hashlib.sha256(data).hexdigest()


@pytest.mark.parametrize("stop", [KeyboardInterrupt, OSError])
def test_an_interrupted_npy_write_leaves_no_file(tmp_path, stop):
    array = np.arange(40 * 9, dtype=np.float64).reshape(40, 9)
    calls = []

    def fill(a, b, out):
        calls.append(a)
        if len(calls) == 3:
            raise stop("stopped while writing")
        out[...] = array[a:b]

    target = tmp_path / "f.npy"
    with pytest.raises(stop):
        write_field_npy(target, array.shape, fill, strip_bytes=8 * 9 * 4)
    assert os.listdir(tmp_path) == []  # neither the target nor a temporary file
    target.write_bytes(b"previous")
    with pytest.raises(stop):
        calls.clear()
        with OutputSet(lock_folder=tmp_path) as batch:
            write_field_npy(target, array.shape, fill, strip_bytes=8 * 9 * 4)
            batch.commit()
    assert os.listdir(tmp_path) == ["f.npy"] and target.read_bytes() == b"previous"


def test_solve_writes_the_field_and_its_checksum(tmp_path):
    from relaxtui.cli import main

    case = tmp_path / "plate.toml"
    from PIL import Image

    codes = np.zeros((30, 41), np.uint8)
    codes[0, :] = 1
    codes[-1, :] = codes[:, 0] = codes[:, -1] = 2
    codes[10:14, 12:30] = 3
    im = Image.fromarray(codes, "P")
    im.putpalette([255, 255, 255, 255, 0, 0, 0, 0, 255, 0, 0, 0] + [0] * (252 * 3))
    im.save(tmp_path / "plate.png")
    case.write_text('mask = "plate.png"\n[[region]]\ncolor = "#ffffff"\nkind = "interior"\n'
                    '[[region]]\ncolor = "#ff0000"\nkind = "fixed"\nvalue = 100\n'
                    '[[region]]\ncolor = "#0000ff"\nkind = "fixed"\nvalue = 0\n'
                    '[[region]]\ncolor = "#000000"\nkind = "outside"\n')
    code = main(["solve", str(case), "--method", "multigrid", "--tolerance", "1e-8", "-q", "--out",
                 str(tmp_path / "f.npy"), "--report", str(tmp_path / "r.json")])
    assert code == 0
    report = json.loads((tmp_path / "r.json").read_text())
    data = (tmp_path / "f.npy").read_bytes()
    assert report["outputs"]["field"]["sha256"] == hashlib.sha256(data).hexdigest()
    field = np.load(tmp_path / "f.npy")
    from relaxtui.case import load_case

    expected = solve(load_case(case), method="multigrid", tolerance=1e-8).field
    np.testing.assert_array_equal(field, expected)  # the same deterministic run, exported whole
    lo, hi, peak = numpy_reference(field, load_case(case))
    assert (report["min"], report["max"]) == (lo[0], hi[0])
    assert (report["flux_max"]["value"], report["flux_max"]["row"], report["flux_max"]["col"]) == (peak[0], peak[3], peak[4])
