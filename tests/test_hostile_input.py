"""Hostile and careless input at the command line: one-line errors, no hangs, no clobbered files.

Each check runs the real CLI entry point (relaxtui.cli.main) in this process on files written by
the test; expected behaviour is the contract's (exit 2 on bad input, nothing written, one line
naming the file, key and line) and the issue's reproductions.
"""

from __future__ import annotations

import json
import os
import signal
import warnings
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from relaxtui.cli import main
from cases import hot_cold_toml

def _case_text(mask, extra="", interior=""):
    return 'title = "plate"\n' + hot_cold_toml(mask, head=extra, interior=interior)


def write_case(folder: Path, *, extra: str = "", interior: str = "", mask: str = "plate.png", n: int = 16,
               name: str = "case.toml") -> Path:
    img = np.full((n, n, 3), 255, dtype=np.uint8)
    img[0, :] = 0
    img[1:, 0] = (0, 0, 255)
    img[1:, -1] = (255, 0, 0)
    mask_path = (folder / mask)
    mask_path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(img, "RGB").save(mask_path)
    path = folder / name
    path.write_text(_case_text(mask, extra, interior), encoding="utf-8")
    return path


@pytest.fixture(autouse=True)
def no_hang():
    """Fail instead of hanging forever (a FIFO opened for reading blocks until a writer comes)."""
    def alarm(signum, frame):
        raise TimeoutError("the command hung")

    old = signal.signal(signal.SIGALRM, alarm)
    signal.alarm(120)
    yield
    signal.alarm(0)
    signal.signal(signal.SIGALRM, old)


def cli(args, capsys):
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a RuntimeWarning would reach the user's stderr
        code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def listing(folder: Path):
    return sorted((p.name, p.stat().st_size if p.is_file() else -1) for p in folder.iterdir())


def one_line_error(err: str) -> str:
    assert err.count("\n") == 1 and "error:" in err and "Traceback" not in err, err
    return err


# --- 8: tracebacks become one-line errors with file, key and line ----------------------------------


@pytest.mark.parametrize("extra, needle", [
    ("cell_size = 1e308", "cell_size"),
    ("cell_size = " + "9" * 400, "400 digits"),
    ("depth = 1e-310", "depth"),
])
def test_numbers_float64_cannot_compute_in_are_refused_with_key_and_line(tmp_path, capsys, extra, needle):
    case = write_case(tmp_path, extra=extra)
    for command in ("info", "solve"):
        code, _, err = cli([command, case], capsys)
        assert code == 2
        one_line_error(err)
        assert needle in err and f"{case}:3:" in err  # file and line


def test_a_400_digit_region_value_names_the_key(tmp_path, capsys):
    case = write_case(tmp_path, interior="source = " + "1" * 400)
    code, _, err = cli(["solve", case], capsys)
    assert code == 2 and "'source'" in one_line_error(err) and "digits" in err


def test_deeply_nested_arrays_are_refused_with_the_line(tmp_path, capsys):
    case = write_case(tmp_path, extra="quantity = " + "[" * 5000 + "]" * 5000)
    code, _, err = cli(["info", case], capsys)
    assert code == 2 and "nested" in one_line_error(err) and f"{case}:3:" in err


@pytest.mark.parametrize("k", ["1e-301", "1e301"])
def test_conductivity_beyond_the_computable_range_names_the_key(tmp_path, capsys, k):
    case = write_case(tmp_path, interior=f"conductivity = {k}")
    code, _, err = cli(["info", case], capsys)
    assert code == 2 and "'conductivity'" in one_line_error(err) and "range" in err


@pytest.mark.parametrize("k", ["1e-200", "1e160", "1e200"])
def test_extreme_valid_conductivity_solves(tmp_path, capsys, k):
    """Uniform k scales out of the equations: the closed-form linear profile u_j = 100 j / 15 across the columns."""
    case = write_case(tmp_path, interior=f"conductivity = {k}")
    code, _, err = cli(["solve", case, "--out", tmp_path / "f.npy", "--report", tmp_path / "r.json", "-q",
                        "--tolerance", "1e-6"], capsys)
    assert code == 0, err
    field = np.load(tmp_path / "f.npy")
    assert np.nanmax(np.abs(field[1:] - 100.0 * np.arange(16) / 15.0)) <= 1e-6


def test_one_cell_case_warns_nothing(tmp_path, capsys):
    img = np.array([[[0, 0, 255], [255, 255, 255], [255, 0, 0]]], dtype=np.uint8)
    Image.fromarray(img, "RGB").save(tmp_path / "plate.png")
    (tmp_path / "case.toml").write_text(_case_text("plate.png", "", ""), encoding="utf-8")
    for method in ("jacobi", "sor", "multigrid"):
        code, _, err = cli(["solve", tmp_path / "case.toml", "--method", method, "-q",
                            "--out", tmp_path / "f.npy", "--report", tmp_path / "r.json"], capsys)
        assert code == 0 and err == "", err
        assert abs(float(np.load(tmp_path / "f.npy")[0, 1]) - 50.0) <= 1e-3  # closed form: the mean of 0 and 100


# --- 9: FIFOs and devices are refused, never waited on --------------------------------------------


@pytest.fixture
def fifo(tmp_path):
    path = tmp_path / "pipe"
    os.mkfifo(path)
    return path


def test_fifo_as_case_file(fifo, capsys):
    for command in ("info", "solve"):
        code, _, err = cli([command, fifo], capsys)
        assert code == 2 and "FIFO" in one_line_error(err)


def test_fifo_as_mask(tmp_path, capsys):
    write_case(tmp_path)
    os.mkfifo(tmp_path / "pipe.png")
    (tmp_path / "c2.toml").write_text(_case_text("pipe.png", "", ""), encoding="utf-8")
    code, _, err = cli(["info", tmp_path / "c2.toml"], capsys)
    assert code == 2 and "FIFO" in one_line_error(err)


def test_fifo_as_initial_and_for_init_and_render(tmp_path, fifo, capsys):
    case = write_case(tmp_path)
    code, _, err = cli(["solve", case, "--initial", fifo, "--out", tmp_path / "f.npy"], capsys)
    assert code == 2 and "FIFO" in one_line_error(err)
    assert not (tmp_path / "f.npy").exists()
    code, _, err = cli(["init", fifo, "-o", tmp_path / "new.toml"], capsys)
    assert code == 2 and "FIFO" in one_line_error(err)
    code, _, err = cli(["render", fifo, "--case", case, "-o", tmp_path / "p.png"], capsys)
    assert code == 2 and "FIFO" in one_line_error(err)


def test_device_as_case_file(capsys):
    code, _, err = cli(["info", "/dev/null"], capsys)
    assert code == 2 and "device" in one_line_error(err)


# --- 6 and 7: outputs never overwrite inputs or each other; options checked before any work --------


@pytest.mark.parametrize("args, needle", [
    (["--out", "x", "--report", "x"], "both be written"),
    (["--out", "case.toml"], "case file"),
    (["--report", "plate.png"], "picture"),
    (["--history", "./plate.png"], "picture"),
    (["--out", "f.npy", "--bundle", "sub/../f.npy"], "both be written"),
    (["--picture", "p.png", "--scale", "100000"], "scale"),
    (["--out", "pipe"], "not a regular file"),
])
def test_refused_output_sets_write_nothing(tmp_path, capsys, monkeypatch, args, needle):
    monkeypatch.chdir(tmp_path)
    write_case(tmp_path)
    (tmp_path / "sub").mkdir()
    os.mkfifo(tmp_path / "pipe")
    before = listing(tmp_path)
    code, _, err = cli(["solve", "case.toml", *args], capsys)
    assert code == 2 and needle in one_line_error(err)
    assert listing(tmp_path) == before


def test_output_over_the_initial_field_is_refused(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    write_case(tmp_path)
    assert cli(["solve", "case.toml", "--out", "f.npy", "-q"], capsys)[0] == 0
    before = listing(tmp_path)
    code, _, err = cli(["solve", "case.toml", "--initial", "f.npy", "--out", "f.npy"], capsys)
    assert code == 2 and "initial field" in one_line_error(err)
    assert listing(tmp_path) == before


# --- 11: NaN in --initial names the file; control characters escaped -------------------------------


def test_nan_in_initial_names_the_file(tmp_path, capsys):
    case = write_case(tmp_path)
    bad = np.zeros((16, 16))
    bad[5, 7] = np.nan
    np.save(tmp_path / "start.npy", bad)
    code, _, err = cli(["solve", case, "--initial", tmp_path / "start.npy", "--out", tmp_path / "f.npy"], capsys)
    assert code == 2 and "start.npy" in one_line_error(err) and "row 5, column 7" in err
    assert not (tmp_path / "f.npy").exists()


def test_control_characters_in_names_are_escaped(tmp_path, capsys):
    case = write_case(tmp_path, extra='unit = "K\\u001b[2J"')
    text = case.read_text().replace('title = "plate"', 'title = "x\\u001b]0;owned\\u0007"')
    text = text.replace('name = "void"', 'name = "v\\u001b[31mred"')
    case.write_text(text)
    code, out, err = cli(["info", case], capsys)
    assert code == 0 and "\x1b" not in out and "\x07" not in out
    assert "\\x1b" in out  # shown, escaped
    code, out, err = cli(["solve", case, "--out", tmp_path / "f.npy", "--report", tmp_path / "r.json"], capsys)
    assert code == 0 and "\x1b" not in out + err


# --- 5: a reader detects a report that describes another field --------------------------------------


def test_initial_and_render_warn_when_the_report_describes_another_field(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    write_case(tmp_path)
    assert cli(["solve", "case.toml", "-q"], capsys)[0] == 0
    report = json.loads(Path("case.report.json").read_text())
    assert len(report["run_id"]) == 32 and set(report["outputs"]) == {"field", "history"}
    # a consistent set: no warning
    code, _, err = cli(["render", "case.field.npy", "--case", "case.toml", "-o", "p.png"], capsys)
    assert code == 0 and "warning" not in err
    field = np.load("case.field.npy")
    np.save("case.field.npy", field + 1.0)  # another field beside the report (a broken set)
    code, _, err = cli(["render", "case.field.npy", "--case", "case.toml", "-o", "p.png"], capsys)
    assert code == 0 and "warning" in err and "case.report.json" in err and report["run_id"] in err
    code, _, err = cli(["solve", "case.toml", "--initial", "case.field.npy", "--out", "g.npy", "--report", "g.json",
                        "-q"], capsys)
    assert code == 0 and "warning" in err and "case.report.json" in err


def test_stale_temporary_files_of_a_dead_run_are_cleaned(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    write_case(tmp_path)
    dead = 2 ** 22 + 12345  # above the default pid_max of 4194304: never a live process
    stale = tmp_path / f".case.field.npy.relaxtui-{dead}-abc.part"
    stale.write_bytes(b"x" * 100)
    other = tmp_path / ".case.field.npy.someone-else.part"  # not our naming: left alone
    other.write_bytes(b"y")
    assert cli(["solve", "case.toml", "-q"], capsys)[0] == 0
    assert not stale.exists() and other.exists()


# --- 14: a picture outside the case's folder is read, and shown --------------------------------------


def test_mask_outside_the_case_folder_is_shown(tmp_path, capsys):
    (tmp_path / "cases").mkdir()
    write_case(tmp_path, mask="shared/plate.png", name="tmp.toml")
    case = tmp_path / "cases" / "case.toml"
    case.write_text(_case_text("../shared/plate.png", "", ""), encoding="utf-8")
    resolved = str((tmp_path / "shared" / "plate.png").resolve())
    code, out, _ = cli(["info", case], capsys)
    squeezed = "".join(out.split())  # rich folds long paths over several lines
    assert code == 0 and "outsidethecase'sfolder" in squeezed and "".join(resolved.split()) in squeezed
    code, out, _ = cli(["solve", case, "--report", tmp_path / "r.json"], capsys)
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["mask"] == resolved and report["mask_outside_case_folder"] is True
    assert "outside the case's folder" in out
