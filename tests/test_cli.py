"""The headless command line: exit codes, outputs, resume, interruption, sweep tables.

The converged fields are compared with the independent spsolve assembly in
tests/exact.py; everything else checks the interface the scripts rely on
(the contract's report keys and history columns, exit codes 0/1/2/130,
atomic outputs, nothing written on bad input).
"""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from cases import region_toml
from exact import exact_solution
from PIL import Image

from relaxtui.case import load_case
from relaxtui.cli import main

REPORT_KEYS = {"case", "grid", "unknowns", "snapped", "method", "omega", "tolerance", "status", "sweeps", "seconds",
               "estimated_error", "residual", "convergence_factor", "flows", "source_total", "imbalance", "min", "max"}

PLATE_TOML = """\
title = "test plate"
quantity = "temperature"
unit = "K"
mask = "plate.png"
cell_size = 0.01

[solver]
method = "red-black-sor"
tolerance = 1e-3

""" + "\n".join([
    region_toml("#ffffff", "interior", "plate", conductivity=2.0),
    region_toml("#ff0000", "fixed", "hot", value=100.0),
    region_toml("#0000ff", "fixed", "cold", value=0.0),
    region_toml("#00ff00", "convection", "air", coefficient=50.0, ambient=20.0),
    region_toml("#000000", "outside"),
])


def write_plate(folder: Path, rows=30, cols=40) -> Path:
    img = np.zeros((rows, cols, 3), dtype=np.uint8)
    img[1:-1, 1:-1] = 255
    img[0, 1:-1] = (255, 0, 0)
    img[-1, 1:-1] = (0, 0, 255)
    img[1:-1, -1] = (0, 255, 0)
    img[8:12, 10:14] = 0  # an insulated hole
    Image.fromarray(img, "RGB").save(folder / "plate.png")
    (folder / "plate.toml").write_text(PLATE_TOML, encoding="utf-8")
    return folder / "plate.toml"


@pytest.fixture
def plate(tmp_path):
    return write_plate(tmp_path)


def run_cli(args, capsys):
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def test_help_imports_neither_numba_nor_textual():
    code = ("import sys\nimport relaxtui.cli as c\ntry:\n    c.main(['--help'])\nexcept SystemExit:\n    pass\n"
            "print('numba' in sys.modules, 'textual' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip().splitlines()[-1] == "False False"


def test_python_dash_m_runs_the_cli():
    res = subprocess.run([sys.executable, "-m", "relaxtui", "--help"], capture_output=True, text=True)
    assert res.returncode == 0 and "solve" in res.stdout


def test_solve_converges_and_writes_the_contract(plate, tmp_path, capsys):
    out, rep, hist = tmp_path / "f.npy", tmp_path / "r.json", tmp_path / "h.csv"
    code, stdout, _ = run_cli(["solve", plate, "--out", out, "--report", rep, "--history", hist], capsys)
    assert code == 0
    report = json.loads(rep.read_text())
    assert REPORT_KEYS <= report.keys()
    assert report["status"] == "converged" and report["grid"] == [30, 40]
    assert "not a design approval" in report["caution"]
    field = np.load(out, allow_pickle=False)
    assert field.dtype == np.float64 and field.shape == (30, 40)
    case = load_case(plate)
    exact = exact_solution(case)
    assert np.array_equal(np.isnan(field), np.isnan(exact))  # NaN exactly outside interior and fixed cells
    assert np.nanmax(np.abs(field - exact)) <= 1e-3  # the tolerance, against the independent solve
    with open(hist, newline="") as f:
        rows = list(csv.reader(f))
    assert rows[0] == ["sweep", "seconds", "residual", "estimated_error"]
    assert int(rows[-1][0]) == report["sweeps"]
    assert set(report["flows"]) == {"hot", "cold", "air"}
    assert "equilibrium reached" in stdout
    assert "\\u" not in stdout and "\\x" not in stdout  # no escape text in the summary
    assert not list(tmp_path.glob("*.part"))


def test_printable_keeps_spaces_and_escapes_controls():
    from relaxtui.errors import printable
    # U+202F (narrow no-break space) is relaxtui's thousands separator: it prints as a space
    assert printable("1\u202f464 sweeps") == "1\u202f464 sweeps"
    assert printable("a\u00a0b\u2009c") == "a\u00a0b\u2009c"
    # terminal controls and line separators are shown as escape text, never sent to the terminal
    assert printable("x\x1b[2Jy") == "x\\x1b[2Jy"
    assert printable("p\u2028q\nr") == "p\\u2028q\\nr"


def test_default_outputs_go_to_the_current_folder(plate, tmp_path, capsys, monkeypatch):
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    code, _, _ = run_cli(["solve", plate, "-q"], capsys)
    assert code == 0
    assert sorted(p.name for p in work.iterdir()) == ["plate.field.npy", "plate.history.csv", "plate.report.json"]


def test_sweep_limit_still_writes_everything_and_exits_1(plate, tmp_path, capsys):
    out, rep, hist = tmp_path / "f.npy", tmp_path / "r.json", tmp_path / "h.csv"
    code, _, _ = run_cli(["solve", plate, "--max-sweeps", "5", "--out", out, "--report", rep, "--history", hist, "-q"], capsys)
    assert code == 1
    report = json.loads(rep.read_text())
    assert report["status"] == "sweep-limit" and report["sweeps"] == 5
    assert out.exists() and hist.exists()


def test_resume_from_a_written_field_is_honest(plate, tmp_path, capsys):
    first = tmp_path / "first.npy"
    code, _, _ = run_cli(["solve", plate, "--max-sweeps", "30", "--out", first, "--report", tmp_path / "r1.json", "-q"], capsys)
    assert code == 1
    second = tmp_path / "second.npy"
    rep = tmp_path / "r2.json"
    code, _, _ = run_cli(["solve", plate, "--initial", first, "--tolerance", "1e-6", "--out", second, "--report", rep, "-q"], capsys)
    assert code == 0
    report = json.loads(rep.read_text())
    exact = exact_solution(load_case(plate))
    true_error = np.nanmax(np.abs(np.load(second) - exact))
    assert true_error <= 1e-6 <= 1e-6 + report["estimated_error"]
    assert report["estimated_error"] >= true_error


@pytest.mark.parametrize("args,needle", [
    (["--omega", "2.3"], "omega"),
    (["--omega", "abc"], "omega"),
    (["--method", "nope"], "method"),
    (["--tolerance", "-1"], "tolerance"),
    (["--tolerance", "abc"], "tolerance"),
    (["--max-sweeps", "0"], "max-sweeps"),
    (["--method", "gauss-seidel", "--omega", "1.5"], "gauss-seidel"),
    (["--out", "missing-folder/f.npy"], "does not exist"),
])
def test_bad_options_exit_2_and_write_nothing(plate, tmp_path, capsys, monkeypatch, args, needle):
    monkeypatch.chdir(tmp_path)
    before = set(tmp_path.rglob("*"))
    with pytest.raises(SystemExit) as exc:
        code = main(["solve", str(plate), *args])
        raise SystemExit(code)
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert needle in err and "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert set(tmp_path.rglob("*")) == before


def test_bad_initial_fields_are_refused(plate, tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    np.save(tmp_path / "wrong-shape.npy", np.zeros((3, 3)))
    np.save(tmp_path / "pickled.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    np.save(tmp_path / "ints.npy", np.zeros((30, 40), dtype=np.int64))
    (tmp_path / "junk.npy").write_bytes(b"not numpy at all")
    for name in ("wrong-shape.npy", "pickled.npy", "ints.npy", "junk.npy", "absent.npy"):
        before = set(tmp_path.iterdir())
        code, _, err = run_cli(["solve", plate, "--initial", tmp_path / name, "-q"], capsys)
        assert code == 2, name
        assert "Traceback" not in err and len(err.strip().splitlines()) == 1
        assert set(tmp_path.iterdir()) == before


def test_time_limit(tmp_path, capsys):
    big = write_plate(tmp_path, rows=300, cols=300)
    rep = tmp_path / "r.json"
    code, _, _ = run_cli(["solve", big, "--method", "jacobi", "--tolerance", "1e-12", "--time-limit", "0.5",
                          "--report", rep, "--out", tmp_path / "f.npy", "-q"], capsys)
    assert code == 1
    report = json.loads(rep.read_text())
    assert report["status"] == "time-limit" and report["sweeps"] > 0


def test_ctrl_c_writes_outputs_and_exits_130(tmp_path):
    # SIGINT to the installed command while it sweeps: the process stops itself after its first chunk of
    # sweeps (RELAXTUI_TEST_PAUSE_AT=solving, as in tests/test_signals.py), so no sleep has to outlast the
    # preparation; Jacobi to 1e-13 on 400 x 400 cells is far from done after one chunk
    from test_signals import command, cont, wait_stopped

    big = write_plate(tmp_path, rows=400, cols=400)
    proc = subprocess.Popen(command() + ["solve", str(big), "--method", "jacobi", "--tolerance", "1e-13", "--out", "f.npy",
                                         "--report", "r.json", "--history", "h.csv", "-q"],
                            cwd=tmp_path, env=dict(os.environ, RELAXTUI_TEST_PAUSE_AT="solving"), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    wait_stopped(proc)
    proc.send_signal(signal.SIGINT)
    cont(proc)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["status"] == "cancelled" and report["sweeps"] > 0
    assert "SIGINT" in report["message"]
    assert np.load(tmp_path / "f.npy").shape == (400, 400)
    assert "Traceback" not in err


def test_sweep_table_and_csv(plate, tmp_path, capsys):
    table = tmp_path / "t.csv"
    code, out, _ = run_cli(["sweep", plate, "--omega", "1.5:1.9:0.2", "--csv", table, "-q"], capsys)
    assert code == 0
    with open(table, newline="") as f:
        rows = list(csv.DictReader(f))
    assert [r["omega_setting"] for r in rows] == ["1.5", "1.7", "1.9", "auto"]
    assert all(r["status"] == "converged" for r in rows)
    assert sum(int(r["best"]) for r in rows) == 1
    best = min((r for r in rows if r["omega_setting"] != "auto"), key=lambda r: int(r["sweeps"]))
    assert best["best"] == "1"
    assert "auto" in out and "*" in out


def test_sweep_methods(plate, tmp_path, capsys):
    code, out, _ = run_cli(["sweep", plate, "--methods", "jacobi,gauss-seidel,red-black-sor", "-q"], capsys)
    assert code == 0
    for name in ("jacobi", "gauss-seidel", "red-black-sor"):
        assert name in out


@pytest.mark.parametrize("args", [["--omega", "1.9:1.5:0.1"], ["--omega", "1.5:2.5:0.1"], ["--methods", "jacobi,nope"], []])
def test_sweep_bad_settings(plate, capsys, args):
    code, _, err = run_cli(["sweep", plate, *args], capsys)
    assert code == 2 and "Traceback" not in err


@pytest.mark.parametrize("args,needle", [
    (["--method", "multigrid", "--omega", "1.9:1.95:0.01"], "omega scan needs"),  # the help: sor, red-black-sor (or symmetric-sor)
    (["--method", "jacobi", "--omega", "0.5:0.9:0.1"], "omega scan needs"),
    (["--method", "sor", "--methods", "jacobi"], "--method goes with --omega"),
    (["--methods", "jacobi", "--omega", "1.5"], "either --omega or --methods"),
])
def test_sweep_refuses_what_its_help_refuses(plate, tmp_path, capsys, monkeypatch, args, needle):
    monkeypatch.chdir(tmp_path)
    before = set(tmp_path.rglob("*"))
    code, _, err = run_cli(["sweep", plate, *args], capsys)
    assert code == 2 and needle in err and "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert set(tmp_path.rglob("*")) == before


def test_sweep_prints_a_line_per_solve(plate, capsys):
    code, _, err = run_cli(["sweep", plate, "--omega", "1.5,1.7"], capsys)
    assert code == 0
    lines = [line for line in err.splitlines() if line.startswith("relaxtui sweep: [")]
    assert [line.split("]")[0] for line in lines] == ["relaxtui sweep: [1/3", "relaxtui sweep: [2/3", "relaxtui sweep: [3/3"]
    assert all("converged after" in line for line in lines)


def test_symmetric_sor_from_the_command_line(plate, tmp_path, capsys):
    rep = tmp_path / "r.json"
    code, _, _ = run_cli(["solve", plate, "--method", "symmetric-sor", "--omega", "1.6", "--report", rep, "-q"], capsys)
    assert code == 0
    report = json.loads(rep.read_text())
    assert report["method"] == "symmetric-sor" and report["omega"] == 1.6 and report["status"] == "converged"


def test_progress_line_says_what_is_prepared(plate, tmp_path, capsys):
    code, _, err = run_cli(["solve", plate, "--report", tmp_path / "r.json"], capsys)
    assert code == 0
    assert "relaxtui: preparing: assembling the operator" in err
    assert "preparing: estimating the Jacobi radius:" in err and "Lanczos steps" in err
