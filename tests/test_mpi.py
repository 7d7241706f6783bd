"""Solves across MPI ranks: ``mpiexec -n P relaxtui solve`` against the single-process run.

What is checked, and against what:
- Jacobi on 2 and 3 ranks (3: uneven strips) gives the single-process field
  bit for bit for the same sweeps, and the same per-sweep residual history:
  every cell's update is the same arithmetic on the same values (the
  strip-decomposition argument: a halo row carries exactly the values the
  single-process sweep reads). Red-black SOR likewise, to rounding.
- The converged demo and masked cases agree with the single-process run
  within the tolerance, and with the independent spsolve solution
  (tests/exact.py); automatic omega agrees to 1e-6.
- User errors and refused methods end every rank with the one-line message
  and exit code 2 (no hang, no traceback, no output files); an exception on
  one rank aborts the whole job (the guard); SIGTERM under mpiexec writes the
  current field with status "cancelled" and exit code 130, also when it arrives
  during the set-up (ranks paused at exact moments, RELAXTUI_TEST_PAUSE_AT, as
  in tests/test_signals.py) or reaches one rank only.

The launches use a clean environment (no launcher variables of an enclosing
job, one numba thread per rank, the caller's numba cache directory shared by
all ranks), a session of their own and a timeout that kills the whole
process group. They skip, with the reason shown, only where mpi4py is not
installed (``pip install '.[mpi]'``).
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from exact import exact_solution
from PIL import Image

from relaxtui.case import load_case
from relaxtui.cli import main
from relaxtui.parallel import launched_ranks
from relaxtui.parallel.strip import split_rows

ROOT = Path(__file__).resolve().parent.parent
GRIDS = ROOT / "grids"
LAUNCH_TIMEOUT = 300  # seconds; a cold numba cache compiles the strip kernels on the first launch

try:
    import mpi4py  # noqa: F401

    HAVE_MPI4PY = True
except ImportError:
    HAVE_MPI4PY = False


def _mpiexec() -> str | None:
    return shutil.which("mpiexec", path=str(Path(sys.executable).parent)) or shutil.which("mpiexec")


needs_mpi = pytest.mark.skipif(not HAVE_MPI4PY, reason="mpi4py is not installed: pip install '.[mpi]' to run the MPI tests")

LAUNCHER_PREFIXES = ("PMI_", "PMIX_", "HYDRA_", "MPIR_", "OMPI_", "I_MPI_", "MPI_LOCAL")


def clean_env(extra: dict | None = None) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith(LAUNCHER_PREFIXES)}
    env["NUMBA_NUM_THREADS"] = "1"
    env.update(extra or {})
    return env


def mpirun(ranks: int, args, cwd: Path, *, timeout: float = LAUNCH_TIMEOUT, env: dict | None = None):
    """Run ``mpiexec -n ranks python -m relaxtui ARGS`` in ``cwd``; returns (code, stdout, stderr)."""
    exe = _mpiexec()
    assert exe is not None, "mpi4py is installed but no mpiexec was found next to the interpreter or on PATH"
    cmd = [exe, "-n", str(ranks), sys.executable, "-m", "relaxtui", *[str(a) for a in args]]
    return _launch(cmd, cwd, timeout=timeout, env=env)


def _launch(cmd, cwd, *, timeout=LAUNCH_TIMEOUT, env=None):
    """Run ``cmd`` in its own session (signals at exact moments: PausedJob). Returns (code, stdout, stderr)."""
    proc = subprocess.Popen(cmd, cwd=cwd, env=clean_env(env), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)
    chunks = {"out": [], "err": []}
    readers = [threading.Thread(target=lambda s=stream, k=key: chunks[k].extend(iter(s.readline, "")), daemon=True)
               for stream, key in ((proc.stdout, "out"), (proc.stderr, "err"))]
    for t in readers:
        t.start()
    deadline = time.time() + timeout
    try:
        proc.wait(timeout=max(1.0, deadline - time.time()))
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
        pytest.fail(f"mpiexec did not finish within {timeout} s (a hang): {' '.join(map(str, cmd))}\n"
                    f"{''.join(chunks['err'])[-2000:]}")
    for t in readers:
        t.join(timeout=10)
    return proc.returncode, "".join(chunks["out"]), "".join(chunks["err"])


def single(args, tmp_path: Path, capsys) -> int:
    code = main([str(a) for a in args])
    capsys.readouterr()
    return code


# --- cases written to disk -----------------------------------------------------------------------

COLOURS = ["#ffffff", "#c08040", "#ff0000", "#0000ff", "#00ff00", "#ff00ff", "#000000", "#808080"]


def write_case(folder: Path, name: str, codes: np.ndarray, regions: list[str], solver: str = "") -> Path:
    """A PNG (one colour per code) and a TOML whose regions are the given TOML bodies, in code order."""
    rgb = np.zeros(codes.shape + (3,), dtype=np.uint8)
    for k in range(len(regions)):
        rgb[codes == k] = [int(COLOURS[k][i : i + 2], 16) for i in (1, 3, 5)]
    Image.fromarray(rgb, "RGB").save(folder / f"{name}.png")
    text = [f'title = "{name}"', 'quantity = "temperature"', 'unit = "K"', f'mask = "{name}.png"', "cell_size = 0.01",
            "snap = false", ""]
    if solver:
        text += ["[solver]", solver, ""]
    for k, body in enumerate(regions):
        text += ["[[region]]", f'color = "{COLOURS[k]}"', body, ""]
    (folder / f"{name}.toml").write_text("\n".join(text), encoding="utf-8")
    return folder / f"{name}.toml"


def masked_case(folder: Path) -> Path:
    """31 x 23 cells: two materials with a source, fixed top and bottom (one with a contact conductance),
    a convection edge, a flux edge, an insulated hole and outside corners; 31 rows cut unevenly by 2 and 3."""
    rows, cols = 31, 23
    c = np.zeros((rows, cols), dtype=np.uint8)  # 0 plate
    c[10:17, 5:13] = 1  # insert
    c[0, :] = 2  # hot
    c[-1, :] = 3  # cold
    c[1:-1, -1] = 4  # air
    c[:, 0] = 6  # void
    c[5:26, 0] = 5  # heater
    c[20:24, 14:19] = 6  # hole
    c[0, 0] = c[0, -1] = c[-1, 0] = c[-1, -1] = 6
    regions = ['name = "plate"\nkind = "interior"\nconductivity = 2.0\nsource = 50.0',
               'name = "insert"\nkind = "interior"\nconductivity = 0.3',
               'name = "hot"\nkind = "fixed"\nvalue = 100.0',
               'name = "cold"\nkind = "fixed"\nvalue = 0.0\nconductivity = 5.0',
               'name = "air"\nkind = "convection"\ncoefficient = 30.0\nambient = 20.0',
               'name = "heater"\nkind = "flux"\nflux = 500.0',
               'name = "void"\nkind = "outside"']
    return write_case(folder, "masked", c, regions, 'method = "red-black-sor"\ntolerance = 1e-6')


def mix_case(folder: Path, low: float) -> Path:
    """64 x 64 cells: a random half-and-half mix of conductivities 1 and ``low`` (tests/test_multigrid.py's
    stress case), held at 100 on top and 0 on the other sides."""
    n = 64
    codes = np.full((n, n), 2, dtype=np.uint8)  # 2 cold frame
    codes[0, :] = 3  # hot top
    codes[1:-1, 1:-1] = (np.random.default_rng(3).random((n - 2, n - 2)) < 0.5).astype(np.uint8)
    regions = ['name = "plate"\nkind = "interior"\nconductivity = 1.0',
               f'name = "low"\nkind = "interior"\nconductivity = {low!r}',
               'name = "cold"\nkind = "fixed"\nvalue = 0.0',
               'name = "hot"\nkind = "fixed"\nvalue = 100.0']
    return write_case(folder, "mix", codes, regions)


def read(folder: Path, stem: str):
    return (np.load(folder / f"{stem}.npy"), json.loads((folder / f"{stem}.json").read_text()),
            np.loadtxt(folder / f"{stem}.csv", delimiter=",", skiprows=1, ndmin=2))


def outputs(stem: str) -> list[str]:
    return ["--out", f"{stem}.npy", "--report", f"{stem}.json", "--history", f"{stem}.csv"]


# --- without MPI ---------------------------------------------------------------------------------


def test_the_commands_of_rank_0_have_codes_of_their_own():
    # rank 0 commands the other ranks by number (relaxtui.parallel.group.follow): two commands with one
    # number make the followers run the wrong collective and the job hang (it did: MG_BOUND took
    # COARSE_BEGIN's 41)
    from relaxtui.parallel import group

    names = ["SETUP", "NEW_FIELD", "SWEEP", "RESIDUAL", "FLOWS", "EXPORT", "LANCZOS_BEGIN", "LANCZOS_ADVANCE", "SCALE",
             "SUMMARY", "STOP", "MG_SETUP", "MG_SWEEP", "MG_RELEASE", "CELLS", "MG_NORM", "MG_BOUND", "COARSE_BEGIN",
             "COARSE_ADVANCE", "COARSE_RELEASE", "STOP_CHECK"]
    codes = [getattr(group, n) for n in names]
    assert len(set(codes)) == len(codes), dict(zip(names, codes))
    source = Path(group.__file__).read_text(encoding="utf-8")
    assert [n for n in names if f"code == {n}:" not in source] == []  # every one has its branch in follow


def test_launcher_detection_reads_only_the_environment():
    # Variable names: MPICH/Hydra's PMI_SIZE and PMI_RANK, Open MPI's OMPI_COMM_WORLD_SIZE (from memory
    # of their documentation; the Hydra ones checked here by printing a rank's environment).
    assert launched_ranks({}) == 0
    assert launched_ranks({"PMI_SIZE": "4", "PMI_RANK": "1"}) == 4
    assert launched_ranks({"OMPI_COMM_WORLD_SIZE": "2"}) == 2
    assert launched_ranks({"PMI_SIZE": "1", "PMI_RANK": "0"}) == 1
    assert launched_ranks({"PMI_RANK": "0"}) == 2  # a launch of unknown size: ask MPI
    assert launched_ranks({"MPI_LOCALNRANKS": "1"}) == 0


def test_strips_balance_unknowns_not_rows():
    # A picture whose lower half holds nine times the unknowns per row: an even split by rows
    # would give the second rank 90 % of the work.
    weights = np.array([1] * 50 + [9] * 50)
    parts = split_rows(weights, 2)
    assert parts[0][0] == 0 and parts[-1][1] == 100 and parts[0][1] == parts[1][0]
    work = [weights[a:b].sum() for a, b in parts]
    assert abs(work[0] - work[1]) <= 9  # within one row of the halves
    # every strip gets a row even where the rows carry no unknowns
    assert all(b > a for a, b in split_rows(np.array([0, 0, 0, 5]), 4))
    three = split_rows(np.ones(31), 3)
    assert sorted(b - a for a, b in three) == [10, 10, 11]


def test_plain_solve_never_imports_mpi4py(tmp_path):
    case = masked_case(tmp_path)
    code = ("import sys; from relaxtui.cli import main; "
            f"rc = main(['solve', {str(case)!r}, '--max-sweeps', '5', '-q', '--out', 'f.npy']); "
            "assert 'mpi4py' not in sys.modules, 'mpi4py was imported'; sys.exit(0 if rc in (0, 1) else rc)")
    proc = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, env=clean_env(), capture_output=True, text=True,
                          timeout=LAUNCH_TIMEOUT)
    assert proc.returncode == 0, proc.stderr


def test_info_prints_the_per_rank_memory(tmp_path, capsys):
    from relaxtui.parallel.memory import rank_bytes
    from relaxtui.solver import memory

    case = masked_case(tmp_path)
    assert main(["info", str(case), "--ranks", "4"]) == 0
    out = capsys.readouterr().out
    assert "4 MPI ranks" in out
    # the strip model: a non-root rank needs what one process needs for its strip plus its two halo
    # rows (the same byte model, relaxtui.solver.memory); rank 0 adds about 9 B/cell of the whole
    # grid (the region picture and, one at a time, the decoded picture, class array or gathered field)
    rows, cols = 4096, 4096
    for method in ("red-black-sor", "jacobi"):
        r0, other = rank_bytes(rows, cols, method, 1, 4)
        assert other == memory.estimate_solve_bytes(rows // 4 + 2, cols, method, fine_radius=True)
        assert r0 - other == 9 * rows * cols
    one = memory.estimate_solve_bytes(rows, cols, "jacobi", fine_radius=True) - memory.FIXED_BYTES  # the ranks' Lanczos is fine
    assert one / 4 < rank_bytes(rows, cols, "jacobi", 1, 4)[1] - memory.FIXED_BYTES < 1.4 * one / 4
    assert r0 > other


# --- under mpiexec ---------------------------------------------------------------------------------


@needs_mpi
@pytest.mark.parametrize("ranks", [2, 3])
def test_jacobi_is_bit_for_bit_the_single_process_field(ranks, tmp_path, capsys):
    case = masked_case(tmp_path)
    opts = ["--method", "jacobi", "--tolerance", "1e-12", "--max-sweeps", "150", "-q"]
    if ranks == 3:  # also scatter a starting field: the converged-looking field of a short red-black run
        assert single(["solve", case, "--max-sweeps", "40", "-q", "--out", tmp_path / "start.npy"], tmp_path, capsys) == 1
        opts += ["--initial", str(tmp_path / "start.npy")]
    assert single(["solve", case, *opts, *outputs(str(tmp_path / "one"))], tmp_path, capsys) == 1
    code, _, err = mpirun(ranks, ["solve", case, *opts, *outputs("many")], tmp_path)
    assert code == 1, err
    f1, r1, h1 = read(tmp_path, "one")
    fp, rp, hp = read(tmp_path, "many")
    assert np.array_equal(f1, fp, equal_nan=True)
    assert rp["sweeps"] == r1["sweeps"] == 150 and rp["status"] == r1["status"] == "sweep-limit"
    assert np.array_equal(h1[:, [0, 2]], hp[:, [0, 2]])  # sweep numbers and per-sweep residuals
    assert set(rp) == set(r1)
    for key in ("min", "max", "min_at", "max_at", "flux_max", "unknowns", "grid", "residual"):
        assert rp[key] == r1[key], key
    for name, flow in r1["flows"].items():  # summed in another order: equal to rounding
        assert rp["flows"][name] == pytest.approx(flow, rel=1e-12, abs=1e-12)


@needs_mpi
def test_single_precision_across_ranks_runs_in_double_and_says_so(tmp_path, capsys):
    # the strips keep float64 (relaxtui.solver.driver.Run._field_dtype): the same field as a plain
    # double run, and the report's precision says what was used. The double run is the one-process
    # run (one mpiexec launch fewer): the ranks' double Jacobi is that field bit for bit
    # (test_jacobi_is_bit_for_bit_the_single_process_field).
    case = masked_case(tmp_path)
    opts = ["--method", "jacobi", "--tolerance", "1e-12", "--max-sweeps", "60", "-q"]
    code, _, err = mpirun(2, ["solve", case, *opts, "--precision", "single", *outputs("single")], tmp_path)
    assert code == 1, err
    assert single(["solve", case, *opts, *outputs(str(tmp_path / "double"))], tmp_path, capsys) == 1
    fs, rs, _ = read(tmp_path, "single")
    fd, rd, _ = read(tmp_path, "double")
    assert rs["precision"] == rd["precision"] == "double" and "MPI" in rs["precision_note"]
    assert np.array_equal(fs, fd, equal_nan=True)


@needs_mpi
def test_red_black_equals_the_single_process_field_to_rounding(tmp_path, capsys):
    case = masked_case(tmp_path)
    opts = ["--method", "red-black-sor", "--omega", "1.7", "--tolerance", "1e-14", "--max-sweeps", "120", "-q"]
    single(["solve", case, *opts, *outputs(str(tmp_path / "one"))], tmp_path, capsys)
    code, _, err = mpirun(3, ["solve", case, *opts, *outputs("many")], tmp_path)
    assert code in (0, 1), err
    f1, r1, h1 = read(tmp_path, "one")
    fp, rp, hp = read(tmp_path, "many")
    assert rp["sweeps"] == r1["sweeps"]
    assert np.allclose(fp, f1, rtol=1e-13, atol=1e-12, equal_nan=True)
    assert np.allclose(hp[:, 2], h1[:, 2], rtol=1e-12, atol=1e-300)


@needs_mpi
def test_converged_masked_case_and_demo_agree_with_one_process(tmp_path, capsys):
    masked = masked_case(tmp_path)
    demo = GRIDS / "electrodes.toml"
    for stem, case in (("masked", masked), ("demo", demo)):
        assert single(["solve", case, "-q", *outputs(str(tmp_path / f"{stem}-one"))], tmp_path, capsys) == 0
        code, out, err = mpirun(2, ["solve", case, *outputs(f"{stem}-many")], tmp_path)
        assert code == 0, err
        assert "converged" in out and "Traceback" not in err
        f1, r1, _ = read(tmp_path, f"{stem}-one")
        fp, rp, _ = read(tmp_path, f"{stem}-many")
        assert rp["status"] == "converged" and set(rp) == set(r1)
        assert rp["omega"] == pytest.approx(r1["omega"], abs=1e-6)  # the distributed Lanczos estimate
        tol = r1["tolerance"]
        assert np.nanmax(np.abs(fp - f1)) <= 2 * tol  # both within tol of the discrete solution
        if stem == "masked":  # and against the independent sparse direct solve
            exact = exact_solution(load_case(masked))
            assert np.nanmax(np.abs(fp - exact)) <= tol
        scale = sum(abs(v) for v in r1["flows"].values())
        for name, flow in r1["flows"].items():
            assert abs(rp["flows"][name] - flow) <= 1e-3 * scale, name


@needs_mpi
def test_v11_face_physics_flows_and_flux_match_one_process(tmp_path, capsys):
    # case format v1.1 (contacts, orthotropy): the flows use face conductances that the strips' v1
    # flows kernel does not know; under mpiexec they are the single-process ones (read on rank 0 from
    # the gathered field), the same field bit for bit (Jacobi), flux_max from the same per-cell k
    rows, cols = 17, 13
    c = np.zeros((rows, cols), dtype=np.uint8)  # 0 plate
    c[5:12, 3:9] = 1  # insert, orthotropic
    c[0, :], c[-1, :] = 2, 3  # hot, cold
    regions = ['name = "plate"\nkind = "interior"\nconductivity = 2.0\nsource = 50.0',
               'name = "insert"\nkind = "interior"\nconductivity = [0.3, 3.0]',
               'name = "hot"\nkind = "fixed"\nvalue = 100.0',
               'name = "cold"\nkind = "fixed"\nvalue = 0.0\nconductivity = 5.0']
    case = write_case(tmp_path, "faces", c, regions)
    with case.open("a", encoding="utf-8") as f:
        f.write('\n[[contact]]\nbetween = ["plate", "cold"]\nresistance = 0.05\n')
    assert load_case(case).per_face_physics
    opts = ["--method", "jacobi", "--tolerance", "1e-12", "--max-sweeps", "80", "-q"]
    assert single(["solve", case, *opts, *outputs(str(tmp_path / "one"))], tmp_path, capsys) == 1
    code, _, err = mpirun(2, ["solve", case, *opts, *outputs("many")], tmp_path)
    assert code == 1, err
    f1, r1, _ = read(tmp_path, "one")
    fp, rp, _ = read(tmp_path, "many")
    assert np.array_equal(f1, fp, equal_nan=True)
    for key in ("min", "max", "min_at", "max_at", "flux_max"):
        assert rp[key] == r1[key], key
    for name, flow in r1["flows"].items():
        assert rp["flows"][name] == pytest.approx(flow, rel=1e-12, abs=1e-12), name
    assert rp["imbalance"] == pytest.approx(r1["imbalance"], rel=1e-9, abs=1e-12)


def comb_case(folder: Path) -> Path:
    """21 x 40 cells: a spine two cells wide from a hot to a cold row, and one full-width tooth on row 9. Cut
    into 3 strips by unknowns it gives [0, 9), [9, 10), [10, 21): the middle strip is the one odd row 9, which
    owns no 2 x 2 block of the two-level estimate, and the first strip's last block straddles rows 8-9."""
    c = np.full((21, 40), 3, dtype=np.uint8)
    c[0, :] = 1
    c[-1, :] = 2
    c[1:-1, 0:2] = 0
    c[9, :] = 0
    return write_case(folder, "comb", c, ['name = "plate"\nkind = "interior"\nsource = 10.0',
                                          'name = "hot"\nkind = "fixed"\nvalue = 1.0',
                                          'name = "cold"\nkind = "fixed"\nvalue = 0.0', 'name = "void"\nkind = "outside"'])


def lanczos_steps(note: str) -> int:
    return int(note.split(" Lanczos steps")[0].rsplit(" ", 1)[1])


@needs_mpi
@pytest.mark.parametrize("ranks", [2, 3])
def test_two_level_auto_omega_is_the_single_process_omega(ranks, tmp_path, capsys, monkeypatch):
    # Large grids take auto omega from the two-level estimate (relaxtui.solver.coarse); across ranks it runs
    # by strips of 2 x 2 blocks (relaxtui.parallel.coarse). RELAXTUI_COARSE_UNKNOWNS=0 takes that path on
    # small grids. The issue asks for the single-process omega to 1e-6; the row sums added with math.fsum
    # make it the same number (measured: bit for bit, here and on the 4096^2 aquifer demo). Uneven cuts:
    # the heat spreader's 2 strips start at rows 0 and 31 (odd: a block straddles the cut); the comb's 3
    # strips include a one-row strip that owns no block.
    case = GRIDS / "heat-spreader.toml" if ranks == 2 else comb_case(tmp_path)
    opts = ["--method", "red-black-sor", "--omega", "auto", "--max-sweeps", "1", "-q"]  # omega is chosen before the sweeps
    assert single(["solve", case, *opts, *outputs(str(tmp_path / "fine"))], tmp_path, capsys) == 1
    monkeypatch.setenv("RELAXTUI_COARSE_UNKNOWNS", "0")
    assert single(["solve", case, *opts, *outputs(str(tmp_path / "one"))], tmp_path, capsys) == 1
    code, _, err = mpirun(ranks, ["solve", case, *opts, *outputs("many")], tmp_path, env={"RELAXTUI_COARSE_UNKNOWNS": "0"})
    assert code == 1, err
    fine, one, many = (read(tmp_path, stem)[1] for stem in ("fine", "one", "many"))
    # the knob took the two-level path: its omega is not the fine estimate's (measured 7.2e-6 and 1.7e-4 apart)
    assert abs(one["omega"] - fine["omega"]) > 5e-6
    assert many["omega"] == pytest.approx(one["omega"], abs=1e-6)
    assert lanczos_steps(many["omega_note"]) == lanczos_steps(one["omega_note"])  # the same stopping decisions


@needs_mpi
def test_refused_method_and_bad_case_end_every_rank_with_one_line(tmp_path):
    case = masked_case(tmp_path)
    code, _, err = mpirun(2, ["solve", case, "--method", "sor", "-q", "--out", "f.npy"], tmp_path)
    assert code == 2
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and "red-black-sor" in lines[0] and "MPI" in lines[0], err
    assert not (tmp_path / "f.npy").exists()
    code, _, err = mpirun(2, ["solve", case, "--method", "symmetric-sor", "-q"], tmp_path)
    assert code == 2 and len([ln for ln in err.splitlines() if ln.strip()]) == 1 and "symmetric-sor" in err, err
    code, _, err = mpirun(3, ["solve", tmp_path / "missing.toml", "-q"], tmp_path)
    assert code == 2 and "Traceback" not in err
    assert len([ln for ln in err.splitlines() if ln.strip()]) == 1, err


@needs_mpi
@pytest.mark.parametrize("ranks", [2, 3])
def test_multigrid_iterates_as_one_process(ranks, tmp_path):
    # The distributed cycle is the single-process cycle (same kernels on the same values, strips
    # trading halo rows), so CG's iterations agree to rounding: the per-iteration residuals and the
    # factor of the stopping rule (the issue asks for the factor within 10 %; rounding only is expected),
    # the level hierarchy, and the field. Reference: the single-process run, one numba thread (its
    # parallel kernels then run serially: a deterministic reference). On 2 ranks the electrodes demo
    # keeps levels 0-2 split (gathering below 500 cells; 3 is the coarsest); on 3 ranks the masked case
    # (uneven strips, holes, every boundary kind) gathers level 1, the coarsest.
    if ranks == 2:
        case, env = GRIDS / "electrodes.toml", {"RELAXTUI_MPI_GATHER_CELLS": "500"}
    else:
        case, env = masked_case(tmp_path), {}
    opts = ["solve", str(case), "--method", "multigrid", "--tolerance", "1e-9", "-q"]
    one = subprocess.run([sys.executable, "-m", "relaxtui", *opts, *outputs("one")], cwd=tmp_path, env=clean_env(),
                         capture_output=True, text=True, timeout=LAUNCH_TIMEOUT)
    assert one.returncode == 0, one.stderr
    code, _, err = mpirun(ranks, [*opts, *outputs("many")], tmp_path, env=env)
    assert code == 0, err
    f1, r1, h1 = read(tmp_path, "one")
    fp, rp, hp = read(tmp_path, "many")
    assert set(rp) == set(r1) and rp["status"] == r1["status"] == "converged"
    assert rp["sweeps"] == r1["sweeps"] >= 3
    assert rp["method_info"]["levels"] == r1["method_info"]["levels"]
    split = "levels 0-2 split" if ranks == 2 else "levels 0-0 split"
    assert split in rp["method_info"]["cycle"] and rp["method_info"]["cycle"].startswith(r1["method_info"]["cycle"])
    # residual per iteration: the single process stores its coarse interpolation weights in float32
    # (relaxtui.kernels.multigrid.WEIGHT_DTYPE), the ranks' levels in float64, so the cycles differ by
    # float32 roundings of the weights: each iteration by about float32's epsilon times the residual it
    # corrects. Measured: at most 2e-10 of the first residual; the tolerance is 1e-8 of it (from the
    # size of float32's epsilon, 1.2e-7, times the first iteration's factor, below 0.05).
    assert np.allclose(hp[:, 2], h1[:, 2], rtol=1e-6, atol=1e-8 * h1[0, 2])
    # the factor comes from the last, smallest updates (near 1e-9 of the field): rounding shows there first
    assert rp["convergence_factor"] == pytest.approx(r1["convergence_factor"], rel=1e-2)
    scale = np.nanmax(np.abs(f1))
    assert np.nanmax(np.abs(fp - f1)) <= 1e-9 * scale
    assert np.array_equal(np.isnan(fp), np.isnan(f1))


NORM_PROBE = """
import json, sys
import numpy as np
from mpi4py import MPI
from relaxtui.parallel.comm import install_guard
comm = MPI.COMM_WORLD
install_guard(comm, "probe")
if comm.Get_rank() != 0:
    from relaxtui.parallel.group import follow
    sys.exit(follow(comm, 1))
from relaxtui.case import load_case
from relaxtui.parallel.group import DistributedOperator, Group
from relaxtui.solver import conditioning
from relaxtui.solver.driver import Run
case = load_case(sys.argv[1])
group = Group(comm)
run = Run(case, method="multigrid", tolerance=1e-9)
run.operator = DistributedOperator(case, group, 1, multigrid=True)
run.prepare()
run.step(0.0)  # one CG iteration first: the norm takes over CG's work vectors, CG must restart after it
run.operator.inverse_norm = None  # small grids get the exact norm at set-up: ask the hierarchy instead
norm, how = conditioning.inverse_norm(run)
while not run.done:
    run.step(1.0)
np.save("field.npy", run.result().field)
print(json.dumps({"norm": norm, "how": how, "status": run.status}))
group.stop(0)
"""


def _norm_across_ranks(ranks: int, case: Path, tmp_path: Path, env: dict | None = None):
    """NORM_PROBE on ``ranks`` ranks: (its JSON line, the single-process MultigridStepper.inverse_norm,
    max w of scipy's spsolve of A w = diag(A) on tests/exact.py's matrix)."""
    import scipy.sparse.linalg
    from exact import assemble

    from relaxtui.solver.assembled import Operator
    from relaxtui.solver.multigrid import MultigridStepper

    script = tmp_path / "norm_probe.py"
    script.write_text(NORM_PROBE, encoding="utf-8")
    code, out, err = _launch([_mpiexec(), "-n", str(ranks), sys.executable, "-m", "mpi4py", str(script), str(case)],
                             tmp_path, env=env)
    assert code == 0, err
    got = json.loads([ln for ln in out.splitlines() if ln.startswith("{")][-1])
    loaded = load_case(case)
    one = MultigridStepper(Operator(loaded)).inverse_norm()
    matrix, _, _ = assemble(loaded)
    want = float(np.max(scipy.sparse.linalg.spsolve(matrix.tocsc(), matrix.diagonal())))
    return got, one, want


@needs_mpi
@pytest.mark.parametrize("ranks", [2, 3])
def test_multigrid_norm_of_the_inverse_is_the_single_process_one(ranks, tmp_path):
    # The residual certificate's ||(I - W)^-1||_inf = max w for (I - W) w = 1 (relaxtui.solver.conditioning;
    # an M-matrix's inverse is non-negative, common practice) is solved for with the distributed hierarchy,
    # by the single-process steps on the same values: the single-process MultigridStepper.inverse_norm to
    # 1e-7 (inner products added in another order), and scipy's spsolve on tests/exact.py's matrix
    # within the method's 1 % (the bound max w / (1 - rho) at a residual rho <= 5e-3: from above). The CG
    # iteration it interrupted restarts and still reaches the spsolve solution. 2 ranks: the electrodes
    # demo with levels 0-2 split; 3 ranks: the masked case (uneven strips, every boundary kind).
    if ranks == 2:
        case, env = GRIDS / "electrodes.toml", {"RELAXTUI_MPI_GATHER_CELLS": "500"}
    else:
        case, env = masked_case(tmp_path), {}
    got, one, want = _norm_across_ranks(ranks, case, tmp_path, env)
    assert got["how"] == "solved for with the multigrid hierarchy" and got["status"] == "converged"
    # rel 1e-7: the same steps on the same float32 interpolation weights, inner products added in
    # another order (the solve's own 1 % tolerance dwarfs that)
    assert one is not None and got["norm"] == pytest.approx(one, rel=1e-7)
    assert 1.0 - 1e-3 <= got["norm"] / want <= 1.02
    loaded = load_case(case)
    field, exact = np.load(tmp_path / "field.npy"), exact_solution(loaded)
    assert np.array_equal(np.isnan(field), np.isnan(exact))
    assert np.nanmax(np.abs(field - exact)) <= 1e-9 * np.nanmax(np.abs(exact)) + 1e-9


@needs_mpi
def test_multigrid_norm_of_the_inverse_on_a_high_contrast_mix_across_ranks(tmp_path):
    # A 64 x 64 random half-and-half mix of conductivities 1 and 1e-8 (tests/test_multigrid.py's stress
    # case): float64 keeps the residual of (I - W) w = 1 from falling, so the norm is the settled max w
    # with its margin (relaxtui.solver.multigrid.inverse_norm_found); 3 ranks take the same decisions
    # from the same numbers: the single-process value to 1e-6, spsolve's within the method's 5 %.
    case = mix_case(tmp_path, 1e-8)
    got, one, want = _norm_across_ranks(3, case, tmp_path)
    assert got["how"] == "solved for with the multigrid hierarchy" and got["status"] != "converged", got
    assert one is not None and got["norm"] == pytest.approx(one, rel=1e-6)
    assert 1.0 - 1e-3 <= got["norm"] / want <= 1.05


@needs_mpi
def test_multigrid_certifies_a_high_contrast_mix_across_ranks(tmp_path):
    # A 1:1e5 mix: multigrid's converged needs the residual certificate there, weighed cell by cell
    # (relaxtui.solver.multigrid.MultigridStepper.residual_bound; by strips under MPI, one collective
    # command of its own). 3 ranks against one process and scipy's spsolve (tests/exact.py): both
    # converged and within the tolerance of the exact discrete solution. At this contrast CG's
    # rounding differs from the single process's by 0.3 % of the residual after 19 steps (inner
    # products added in another order), so the stop may come one step apart.
    case = mix_case(tmp_path, 1e-5)
    opts = ["solve", str(case), "--method", "multigrid", "--tolerance", "1e-6", "-q"]
    one = subprocess.run([sys.executable, "-m", "relaxtui", *opts, *outputs("one")], cwd=tmp_path, env=clean_env(),
                         capture_output=True, text=True, timeout=LAUNCH_TIMEOUT)
    assert one.returncode == 0, one.stderr
    code, _, err = mpirun(3, [*opts, *outputs("many")], tmp_path)
    assert code == 0, err
    f1, r1, _ = read(tmp_path, "one")
    fp, rp, _ = read(tmp_path, "many")
    assert r1["status"] == rp["status"] == "converged", (r1["message"], rp["message"])
    assert abs(r1["sweeps"] - rp["sweeps"]) <= 2
    exact = exact_solution(load_case(case))
    for field, report in ((f1, r1), (fp, rp)):
        error = float(np.nanmax(np.abs(field - exact)))
        assert error <= report["estimated_error"] <= 1e-6, (error, report["estimated_error"])


@needs_mpi
def test_probes_are_read_on_the_ranks_that_hold_them(tmp_path, capsys):
    # The well-drawdown demo's probes (y = 12.5 m on 40 rows of 1 m) interpolate between rows 27
    # and 28, which 3 strips cut between ranks 1 and 2; rank 0 holds only its own strip, so each
    # chunk's probe values are read on the ranks that hold them (this once failed with an
    # IndexError on rank 0). Red-black SOR gives the single-process field for the same sweeps,
    # so the probe log matches it number for number (the times differ).
    case = GRIDS / "well-drawdown.toml"
    opts = ["--method", "red-black-sor", "--omega", "1.8", "--max-sweeps", "60", "-q"]
    assert single(["solve", case, *opts, "--out", tmp_path / "one.npy", "--probes", tmp_path / "one.csv"], tmp_path, capsys) == 1
    code, _, err = mpirun(3, ["solve", case, *opts, "--out", "many.npy", "--probes", "many.csv"], tmp_path)
    assert code == 1, err
    one = np.loadtxt(tmp_path / "one.csv", delimiter=",", skiprows=1, ndmin=2)
    many = np.loadtxt(tmp_path / "many.csv", delimiter=",", skiprows=1, ndmin=2)
    assert one.shape[1] == many.shape[1] >= 3 and one[-1, 0] == many[-1, 0] == 60
    assert np.array_equal(one[-1, 2:], many[-1, 2:])


@needs_mpi
def test_an_exception_on_one_rank_aborts_the_job(tmp_path):
    # rank 1 fails while rank 0 waits in a receive that will never be matched: without the
    # guard the job hangs (the MPI notes' trap 4); with it, one line and a non-zero exit
    script = tmp_path / "fail.py"
    script.write_text(
        "from relaxtui.parallel.comm import install_guard, mpi\n"
        "comm = mpi().COMM_WORLD\n"
        "install_guard(comm, 'solve')\n"
        "if comm.Get_rank() == 1:\n"
        "    raise RuntimeError('a strip could not be read')\n"
        "comm.recv(source=1)\n", encoding="utf-8")
    t0 = time.time()
    code, _, err = _launch([_mpiexec(), "-n", "2", sys.executable, str(script)], tmp_path, timeout=120)
    assert code != 0
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert lines == ["relaxtui solve: error on rank 1: RuntimeError: a strip could not be read"], err
    assert time.time() - t0 < 120


@needs_mpi
def test_multigrid_across_ranks_solves_a_field_of_tiny_magnitude(tmp_path):
    # the single-process rescaling of CG's direction where its dot products underflow
    # (tests/test_edges2.py), by strips: 41 x 12 cells between fixed sides 0 and 1e-300 under an
    # insulated top row. Rows alike between insulated borders: the closed form is linear in the
    # column, u_j = 1e-300 j / 11 (the discrete Laplace equation, common practice); before, the
    # ranks said "stalled" after two cycles (r . z and p . A p were 0)
    magnitude, rows, cols = 1e-300, 41, 12
    codes = np.zeros((rows, cols), dtype=np.uint8)
    codes[:, 0], codes[:, -1], codes[0] = 1, 2, 3
    case = write_case(tmp_path, "tiny", codes, ['name = "plate"\nkind = "interior"\nconductivity = 1.0',
                                                'name = "left"\nkind = "fixed"\nvalue = 0.0',
                                                f'name = "right"\nkind = "fixed"\nvalue = {magnitude!r}',
                                                'name = "above"\nkind = "outside"'],
                      f'method = "multigrid"\ntolerance = {1e-6 * magnitude!r}')
    code, _, err = mpirun(2, ["solve", case, "-q", *outputs("tiny")], tmp_path)
    field, report, _ = read(tmp_path, "tiny")
    assert code == 0 and report["status"] == "converged", (report["message"], err)
    exact = np.tile(magnitude * np.arange(cols) / (cols - 1), (rows - 1, 1))
    assert np.max(np.abs(field[1:] - exact)) <= 1e-6 * magnitude


@needs_mpi
def test_ranks_finalise_mpi_and_take_the_quick_exit(tmp_path):
    # the command's quick exit (relaxtui.cli.entry) under mpiexec: each rank runs its atexit
    # handlers, finalises MPI itself (MPI_Finalize is collective: every rank reaches it) and ends
    # without the interpreter's tear-down (the C library's exit, relaxtui.cli._c_exit: C's exit
    # handlers run, the interpreter's finalisation does not), so the __del__ below runs only on a
    # normal exit (Python's documentation: objects still alive at a normal exit are finalised).
    script = tmp_path / "leave.py"
    script.write_text(
        "import atexit, os, sys\n"
        "from relaxtui import cli\n"
        "from relaxtui.parallel.comm import mpi\n"
        "def say(text):\n"
        "    os.write(1, (text + '\\n').encode())  # one write a line: the ranks' lines cannot interleave\n"
        "MPI = mpi()\n"
        "rank = MPI.COMM_WORLD.Get_rank()\n"
        "class Teardown:\n"
        "    def __del__(self):\n"
        "        say(f'teardown {rank}')\n"
        "keep = Teardown()\n"
        "atexit.register(lambda: say(f'atexit {rank} finalized={MPI.Is_finalized()}'))\n"
        "say(f'rank {rank}')\n"
        "cli._exit(3)\n", encoding="utf-8")
    code, out, err = _launch([_mpiexec(), "-n", "2", sys.executable, str(script)], tmp_path, timeout=120)
    assert code == 3, err
    assert sorted(out.splitlines()) == ["atexit 0 finalized=False", "atexit 1 finalized=False", "rank 0", "rank 1"], out
    assert "teardown" not in out and not err.strip(), err


@needs_mpi
def test_a_rank_that_ends_first_leaves_the_others_running(tmp_path):
    # MPICH tells its launcher that a rank ends normally (the PMI "finalize" command) in a C exit
    # handler, not in MPI_Finalize; a rank that ends by os._exit skips it and looks to the launcher
    # like one that died: hydra kills every rank still running (measured with MPICH 5.0.2: a C program
    # calling MPI_Finalize then _exit gave exit 9 in 14 of 16 runs on 4 ranks). The quick exit ends
    # through C's exit (relaxtui.cli._c_exit): here ranks 0 and 1 leave at once with code 3 while
    # rank 2 still works 1.5 s after MPI_Finalize; it must finish its work and the job exit 3 (with
    # os._exit: rank 2 killed, its file missing, exit 9 or 3 at random).
    script = tmp_path / "late.py"
    script.write_text(
        "import time\n"
        "from relaxtui import cli\n"
        "from relaxtui.parallel.comm import mpi\n"
        "MPI = mpi()\n"
        "if MPI.COMM_WORLD.Get_rank() == 2:\n"
        "    real = MPI.Finalize\n"
        "    def finalize_then_work():\n"
        "        real()\n"
        "        time.sleep(1.5)\n"
        "        open('late-rank-done', 'w').close()\n"
        "    MPI.Finalize = finalize_then_work\n"
        "cli._exit(3)\n", encoding="utf-8")
    code, out, err = _launch([_mpiexec(), "-n", "3", sys.executable, str(script)], tmp_path, timeout=120)
    assert (tmp_path / "late-rank-done").exists(), out + err
    assert code == 3, out + err
    assert "BAD TERMINATION" not in out + err


@needs_mpi
def test_sigterm_under_mpiexec_writes_the_current_field(tmp_path):
    # Rank 0 stops itself after the first chunk of sweeps (RELAXTUI_TEST_PAUSE_AT=solving; no timing: the
    # run is then past its preparation); SIGTERM to mpiexec is forwarded to both ranks, and the run ends
    # with the field of the sweeps done, as one process writes it (tests/test_signals.py).
    rows, cols = 240, 200
    c = np.zeros((rows, cols), dtype=np.uint8)
    c[0, :] = 1
    c[-1, :] = 2
    c[:, 0] = c[:, -1] = 2
    case = write_case(tmp_path, "slab", c, ['name = "slab"\nkind = "interior"', 'name = "hot"\nkind = "fixed"\nvalue = 1.0',
                                            'name = "cold"\nkind = "fixed"\nvalue = 0.0'])
    job = PausedJob(2, ["solve", case, "--method", "jacobi", "--tolerance", "1e-13", "--max-sweeps", "100000000",
                        "--out", "f.npy", "--report", "r.json", "--history", "h.csv"], tmp_path, "solving")
    job.wait_stopped(0)
    job.signal_mpiexec(signal.SIGTERM, 0)
    job.cont(0)
    code, _, err = job.finish()
    assert code == 130, err
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["status"] == "cancelled" and report["sweeps"] > 0
    assert report["message"].endswith("(stopped by SIGTERM)"), report["message"]
    field = np.load(tmp_path / "f.npy")
    assert field.shape == (rows, cols) and np.isfinite(field).all()
    assert "Traceback" not in err


# --- in this process (one rank, no mpiexec) ------------------------------------------------------

def test_abort_waits_until_the_launcher_has_read_the_last_line(tmp_path):
    # Abort ends the process at once; the launcher reads our stderr through a pipe, so the error line
    # is kept only if the pipe has been read first (a race seen once in 40 aborts on 4 ranks).
    # drain_stderr waits for an empty pipe: the count of unread bytes is FIONREAD (Linux pipe(7),
    # from memory), here on a pipe standing in for the launcher's.
    from relaxtui.parallel.comm import drain_stderr

    saved = os.dup(2)
    r, w = os.pipe()
    try:
        os.dup2(w, 2)
        os.write(2, b"relaxtui solve: error on rank 1: ...\n")
        assert drain_stderr(0.05) is False  # nobody reads: gives up after the limit
        reader = threading.Timer(0.2, lambda: os.read(r, 1 << 16))
        reader.start()
        assert drain_stderr(30.0) is True  # returns once the reader has taken the line
        reader.join()
        with open(tmp_path / "stderr.txt", "wb") as f:  # not a pipe: nothing to wait for
            os.dup2(f.fileno(), 2)
            os.write(2, b"line\n")
            assert drain_stderr(0.05) is True
    finally:
        os.dup2(saved, 2)
        for fd in (saved, r, w):
            os.close(fd)


def test_given_omega_estimate_that_takes_turns_starts_only_when_it_can_finish():
    # Under MPI the Lanczos slices take turns with the sweeps; with a given omega an estimate that
    # cannot be ready before the run ends would only lengthen it (the stopping rule then measures the
    # factor alone either way). Lanczos limit 600 steps, about 2 sweeps a step before it is timed.
    from relaxtui.parallel.group import DistributedRadiusJob
    from relaxtui.solver.radius import RadiusJob

    job = DistributedRadiusJob(operator=None)
    sweep = 0.034  # seconds a sweep
    assert not job.affordable(1000 * sweep, sweep)  # 1 000 sweeps left: 1 200 sweeps of Lanczos do not fit
    assert job.affordable(3000 * sweep, sweep)  # 3 000 left: half of them (the slices' share) is 1 500 >= 1 200
    job._slice_steps, job._seconds = 100, 100 * 0.5 * sweep  # steps timed at half a sweep: now 1 000 left will do
    assert job.affordable(1000 * sweep, sweep)
    assert not job.running
    job._pending = True
    assert job.running
    job.pause()
    assert not job.running
    assert RadiusJob(operator=None).affordable(0.0, sweep)  # the single-process thread runs beside the sweeps


@needs_mpi
def test_strip_summary_matches_the_whole_field(tmp_path):
    # one rank's strip is the whole 31-row masked case (the hole, the insert and both fixed edges);
    # the summary kernel runs on it in its strip layout, against the numpy extremes and flux
    from mpi4py import MPI

    from relaxtui.output.flux import peak_flux
    from relaxtui.output.report import extremes
    from relaxtui.parallel.group import DistributedOperator, Group

    case = load_case(masked_case(tmp_path))
    op = DistributedOperator(case, Group(MPI.COMM_WORLD), 1)
    u = op.new_field()
    n = 30
    op.sweep(u, "red-black-sor", 1.5, n, np.zeros(n), np.zeros(n))
    field = op.finish(u)
    low, high, peak = op.strip.summary(case.regions, case.cell_size)
    ext, flux = extremes(case, field), peak_flux(field, case)
    assert low[0] == ext["min"] and high[0] == ext["max"]
    assert peak[0] == pytest.approx(flux["value"], rel=1e-12) and (peak[3], peak[4]) == (flux["row"], flux["col"])


# --- stop signals at exact moments (RELAXTUI_TEST_PAUSE_AT, as in tests/test_signals.py) -----------

def _children() -> dict[int, list[int]]:
    table: dict[int, list[int]] = {}
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                ppid = int((d / "stat").read_text().rsplit(")", 1)[1].split()[1])
            except (OSError, IndexError, ValueError):
                continue
            table.setdefault(ppid, []).append(int(d.name))
    return table


def _state(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return ""


def _signal_set(pid: int, field: str, sig: int) -> bool:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith(f"{field}:"):
                return bool(int(line.split()[1], 16) >> (sig - 1) & 1)
    except OSError:
        pass
    return False


def _pending(pid: int, sig: int) -> bool:
    """Whether ``sig`` is pending for the process (its shared pending set, /proc/PID/status ShdPnd)."""
    return _signal_set(pid, "ShdPnd", sig)


def _caught(pid: int, sig: int) -> bool:
    """Whether the process has a handler for ``sig`` (/proc/PID/status SigCgt)."""
    return _signal_set(pid, "SigCgt", sig)


class PausedJob:
    """``mpiexec -n ranks python -m relaxtui ARGS`` whose ranks stop themselves (SIGSTOP) at the pause
    points named in RELAXTUI_TEST_PAUSE_AT; the test signals mpiexec or one rank, then continues them.
    No timing: every wait is for a state the kernel shows in /proc."""

    def __init__(self, ranks: int, args, cwd: Path, pause: str, env: dict | None = None):
        cmd = [_mpiexec(), "-n", str(ranks), sys.executable, "-m", "relaxtui", *[str(a) for a in args]]
        self.cmd = cmd
        self.ranks = ranks
        self.proc = subprocess.Popen(cmd, cwd=cwd, env=clean_env({**(env or {}), "RELAXTUI_TEST_PAUSE_AT": pause}),
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
        self.chunks = {"out": [], "err": []}
        self.readers = [threading.Thread(target=lambda s=s, k=k: self.chunks[k].extend(iter(s.readline, "")), daemon=True)
                        for s, k in ((self.proc.stdout, "out"), (self.proc.stderr, "err"))]
        for t in self.readers:
            t.start()
        self.deadline = time.time() + LAUNCH_TIMEOUT
        self.pids: dict[int, int] = {}

    def _fail(self, what: str):
        os.killpg(self.proc.pid, signal.SIGKILL)
        self.proc.wait()
        pytest.fail(f"{what}: {' '.join(self.cmd)}\n{''.join(self.chunks['err'])[-2000:]}")

    def _wait(self, ok, what: str) -> None:
        while not ok():
            if self.proc.poll() is not None:
                self._fail(f"the job ended (code {self.proc.returncode}) while waiting for {what}")
            if time.time() > self.deadline:
                self._fail(f"timed out waiting for {what}")
            time.sleep(0.02)

    def rank_pids(self) -> dict[int, int]:
        """rank -> pid of the rank processes (mpiexec's descendants that carry PMI_RANK)."""
        def found() -> bool:
            table, todo, ranks = _children(), [self.proc.pid], {}
            while todo:
                for child in table.get(todo.pop(), []):
                    todo.append(child)
                    try:
                        env = Path(f"/proc/{child}/environ").read_bytes().split(b"\0")
                    except OSError:
                        continue
                    rank = next((int(e[9:]) for e in env if e.startswith(b"PMI_RANK=")), None)
                    if rank is not None and b"relaxtui" in Path(f"/proc/{child}/cmdline").read_bytes():
                        ranks[rank] = child
            self.pids = ranks
            return len(ranks) == self.ranks

        self._wait(found, "the rank processes")
        return self.pids

    def wait_stopped(self, *ranks: int) -> None:
        pids = self.rank_pids()
        self._wait(lambda: all(_state(pids[r]) in ("T", "t") for r in ranks), f"ranks {ranks} to reach their pause")

    def signal_mpiexec(self, sig: int, *stopped: int) -> None:
        """Send ``sig`` to mpiexec and wait until its forwarded copy is pending on the ``stopped`` ranks."""
        self.proc.send_signal(sig)
        self._wait(lambda: all(_pending(self.pids[r], sig) for r in stopped), "the forwarded signal")

    def cont(self, *ranks: int) -> None:
        """Continue the ranks and wait until they have taken their pending stop signals (so that a
        later signal cannot merge with one not yet delivered)."""
        for r in ranks:
            os.kill(self.pids[r], signal.SIGCONT)
        sigs = (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)
        self._wait(lambda: not any(_pending(self.pids[r], s) for r in ranks for s in sigs), "the signals to be taken")

    def finish(self) -> tuple[int, str, str]:
        try:
            self.proc.wait(timeout=max(1.0, self.deadline - time.time()))
        except subprocess.TimeoutExpired:
            self._fail("mpiexec did not finish (a hang)")
        for t in self.readers:
            t.join(timeout=10)
        return self.proc.returncode, "".join(self.chunks["out"]), "".join(self.chunks["err"])


def _cancelled_set(folder: Path, stem: str, shape, signame: str) -> dict:
    """The outputs of a run ended by ``signame``: the contract's cancelled set (tests/test_signals.py)."""
    field, report = np.load(folder / f"{stem}.npy"), json.loads((folder / f"{stem}.json").read_text())
    assert (folder / f"{stem}.csv").read_text().startswith("sweep,")  # the history: its header, no sweep yet
    assert report["status"] == "cancelled", report["message"]
    assert report["message"].endswith(f"(stopped by {signame})"), report["message"]  # the single-process wording
    assert field.shape == shape
    assert not list(folder.glob(".*.part"))
    return report


@needs_mpi
@pytest.mark.parametrize("pause", ["multigrid-levels", "multigrid-warm", "lanczos"])
def test_sigterm_during_the_set_up_stops_every_rank_there(tmp_path, pause):
    # "multigrid-levels": both ranks stop themselves before the first coarse level of the set-up
    # (levels 0-2 split: the electrodes demo gathering below 500 cells, as in
    # test_multigrid_iterates_as_one_process); "multigrid-warm": rank 0 stops before it loads the
    # multigrid kernels, rank 1 waits for it; "lanczos": rank 0 stops after the first step of the
    # Jacobi-radius estimate that red-black SOR's auto omega waits for. SIGTERM to mpiexec is forwarded
    # to both ranks. The set-up ends there on every rank (no hierarchy reported; the estimate after one
    # step), and the starting field is written as a cancelled run of one process is.
    case = GRIDS / "electrodes.toml"
    method = "red-black-sor" if pause == "lanczos" else "multigrid"
    ranks = (0, 1) if pause == "multigrid-levels" else (0,)
    job = PausedJob(2, ["solve", case, "--method", method, "--tolerance", "1e-12", *outputs("run")], tmp_path,
                    pause, env={"RELAXTUI_MPI_GATHER_CELLS": "500"})
    job.wait_stopped(*ranks)
    job.signal_mpiexec(signal.SIGTERM, *ranks)
    job.cont(*ranks)
    code, _, err = job.finish()
    assert code == 130, err  # the exit code of status "cancelled" (relaxtui.commands.solve.exit_code)
    report = _cancelled_set(tmp_path, "run", load_case(case).shape, "SIGTERM")
    assert report["sweeps"] == 0
    if method == "multigrid":
        assert "method_info" not in report  # stopped before the hierarchy was complete
    else:
        assert "1/600 Lanczos steps" in report["omega_note"], report["omega_note"]
    assert "Traceback" not in err


@needs_mpi
def test_a_signal_to_one_follower_is_agreed_by_every_rank(tmp_path):
    # Rank 0 stops itself before it loads the kernels while rank 1 waits for it; SIGHUP (a closed
    # terminal: handled like SIGTERM, as in one process) goes to rank 1 only, not through mpiexec. Rank 0
    # has no signal of its own: it learns rank 1's from the agreement after the kernels, and the run
    # ends cancelled, named after rank 1's signal.
    case = masked_case(tmp_path)
    job = PausedJob(2, ["solve", case, "--method", "jacobi", "--tolerance", "1e-13", "-q", *outputs("one")], tmp_path,
                    "operator-warm")
    job.wait_stopped(0)
    job._wait(lambda: _caught(job.pids[1], signal.SIGHUP), "rank 1's stop-signal handler")
    os.kill(job.pids[1], signal.SIGHUP)
    job.cont(0)
    code, _, err = job.finish()
    assert code == 130, err
    report = _cancelled_set(tmp_path, "one", (31, 23), "SIGHUP")
    assert report["sweeps"] == 0
    assert err == ""  # -q: nothing else on stderr, no traceback


@needs_mpi
def test_a_signal_after_the_run_converged_keeps_its_status_and_exit_code(tmp_path):
    # Rank 0 stops itself once the run has converged, before writing; SIGTERM (through mpiexec) then
    # changes nothing: the report says converged, the exit code is 0, as in one process
    # (tests/test_signals.py, the same pause point).
    case = masked_case(tmp_path)
    job = PausedJob(2, ["solve", case, "-q", *outputs("late")], tmp_path, "solved")
    job.wait_stopped(0)
    job.signal_mpiexec(signal.SIGTERM, 0)
    job.cont(0)
    code, _, err = job.finish()
    assert code == 0, err
    _, report, _ = read(tmp_path, "late")
    assert report["status"] == "converged" and "stopped by" not in report["message"]


@needs_mpi
def test_a_second_signal_before_the_writing_stops_the_job_without_writing(tmp_path):
    # As in one process (tests/test_signals.py): the first SIGTERM ends the run, a second one before
    # the writing has begun stops at once, nothing is written, exit code 130, the CLI's one line.
    case = masked_case(tmp_path)
    job = PausedJob(2, ["solve", case, "--method", "jacobi", "--tolerance", "1e-13", "-q", *outputs("two")], tmp_path,
                    "solving,solved")
    job.wait_stopped(0)
    job.signal_mpiexec(signal.SIGTERM, 0)
    job.cont(0)
    job.wait_stopped(0)  # the run has ended, nothing is written yet
    job.signal_mpiexec(signal.SIGTERM, 0)
    job.cont(0)
    code, _, err = job.finish()
    assert code == 130, err
    assert err.strip() == "relaxtui solve: interrupted", err
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith("two.")]


def test_kernel_loading_refuses_to_compile_but_loads_from_the_cache(tmp_path):
    # The ranks 1..P-1 load the kernels beside rank 0 only from numba's disk cache (relaxtui.parallel.group
    # .warm_in_turn): a kernel missing from the cache raises instead of compiling a second time. Checked on
    # a cache=True function of a module of its own: missing -> refused (and compilable afterwards); once a
    # second process has compiled it into the cache -> loaded. numba's documented behaviour (its event API:
    # "numba:compile" is announced only when a function is compiled, from numba's documentation).
    from relaxtui.parallel.group import _load_only, _WouldCompile

    (tmp_path / "cached_add.py").write_text("from numba import njit\n\n@njit(cache=True)\ndef add_one(x):\n"
                                            "    return x + 1\n")
    probe = ("import sys\nsys.path.insert(0, sys.argv[1])\nfrom relaxtui.parallel.group import _load_only, _WouldCompile\n"
             "import cached_add\ntry:\n    with _load_only():\n        print('loaded', cached_add.add_one(1))\n"
             "except _WouldCompile:\n    print('refused', cached_add.add_one(1))\n")
    env = {**os.environ, "NUMBA_CACHE_DIR": str(tmp_path / "cache")}
    runs = [subprocess.run([sys.executable, "-c", probe, str(tmp_path)], env=env, capture_output=True, text=True,
                           timeout=120) for _ in range(2)]
    assert [r.stdout.split() for r in runs] == [["refused", "2"], ["loaded", "2"]], [r.stderr for r in runs]
    with pytest.raises(_WouldCompile):  # in this process too: a fresh function is not in any cache
        sys.path.insert(0, str(tmp_path))
        try:
            import cached_add
        finally:
            sys.path.remove(str(tmp_path))
        with _load_only():
            cached_add.add_one(1)
