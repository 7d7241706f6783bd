"""The TUI's session model and solve worker, driven without a pilot or a screen.

The worker loop runs in a plain thread and posts its events into a list; the
session turns them into states. The physics check (the centre of a plate with
one hot edge sits at a quarter of the hot value) is the superposition argument
of tests/test_tui.py (common practice).
"""

from __future__ import annotations

import math
import threading
import time
from types import SimpleNamespace

import numpy as np
import pytest

from relaxtui.output.text import GROUP, group
from relaxtui.tui import worker as w
from relaxtui.tui.session import Session, SolveControl, chunk_factors, to_go
from test_tui import HOT, centre_mean, make_plate


def progress(**kw):
    base = dict(sweeps=0, seconds=0.0, eta_sweeps=None, eta_seconds=None, status=None)
    base.update(kw)
    return SimpleNamespace(**base)


def load(tmp_path, **kw):
    events = []
    w.load_case(make_plate(tmp_path, **kw), events.append)
    (ev,) = events
    assert isinstance(ev, w.Loaded), ev
    return ev


def drive(session, events):
    for ev in events:
        name = type(ev).__name__
        if name == "Prepared":
            session.prepared(ev.run_id, ev.progress, ev.mu, ev.theory)
        elif name == "Progressed":
            session.progressed(ev.run_id, ev.progress, ev.tail, ev.frame)
        elif name == "Finished":
            session.finished(ev.run_id, ev.result, ev.run)
        elif name == "Failed":
            session.failed(ev.run_id, ev.text)


def start(session, loaded, viewport=None, **options):
    from relaxtui.solver.driver import Run

    run = Run(loaded.case, operator=loaded.operator, **options)
    rec = session.begin(run, "the initial guess", options.get("omega", "auto") == "auto", viewport=viewport)
    return rec, run


def test_group_uses_a_narrow_no_break_space():
    # U+202F NARROW NO-BREAK SPACE: Unicode's non-breaking thin space (ISO 80000-1 grouping)
    assert GROUP == "\u202f"
    assert group(1052095) == f"1{GROUP}052{GROUP}095"
    assert group(999) == "999" and group(12_345.4) == f"12{GROUP}345"


def test_to_go_names_the_limit_that_ends_the_run_first():
    # forecast 1 052 095 sweeps, but the sweep limit 200 000 comes first (issue: "to go" ignored it)
    p = progress(sweeps=10_000, seconds=10.0, eta_sweeps=1_052_095, eta_seconds=1052.1)
    left = to_go(p, 200_000, None)
    assert left.by == "sweep limit" and left.sweeps == 190_000 and left.seconds == pytest.approx(190.0)
    # a time limit earlier still: 5 s left at 1 ms per sweep is 5 000 sweeps
    left = to_go(p, 200_000, 15.0)
    assert left.by == "time limit" and left.seconds == pytest.approx(5.0) and left.sweeps == pytest.approx(5000)
    # the tolerance first
    assert to_go(progress(sweeps=10, seconds=1.0, eta_sweeps=50, eta_seconds=5.0), 200_000, None).by == "tolerance"
    # no forecast yet: the limit is an upper bound
    left = to_go(progress(sweeps=10, seconds=1.0), 1000, None)
    assert left.by == "sweep limit" and not left.forecast and left.sweeps == 990


def test_chunk_factors_recover_a_geometric_decay():
    # r_k = 0.9^k exactly: every chunk's factor is 0.9 (definition of the asymptotic factor)
    s = np.array([0, 10, 25, 40, 41, 80], dtype=float)
    r = 0.9**s
    x, f = chunk_factors(s, r)
    assert list(x) == [10, 25, 40, 80]  # the 1-sweep chunk is left out
    np.testing.assert_allclose(f, 0.9, rtol=1e-12)


def test_solve_control_is_a_queue_of_requests():
    c = SolveControl(None)
    c.step_once()
    c.step_once()
    assert c.take_step() and c.take_step() and not c.take_step()
    c.request_omega(1.5)
    c.request_omega("auto")
    assert c.take_omegas() == [1.5, "auto"] and c.take_omegas() == []
    serial = c.view()[1]
    c.set_view(mode="residual")
    assert c.mode == "residual" and c.view()[1] == serial + 1


def test_worker_runs_a_plate_to_convergence_and_the_session_follows(tmp_path):
    loaded = load(tmp_path)
    session = Session()
    rec, run = start(session, loaded)
    assert session.state() == "preparing" and not session.in_progress()  # nothing swept yet to lose
    events = []
    w.solve_loop(rec.id, run, session.control, loaded.layout, events.append)
    kinds = [type(e).__name__ for e in events]
    assert kinds[0] == "Preparing" and kinds[-1] == "Finished" and "Progressed" in kinds
    # the preparation says what it does (the driver's stages), before the first sweep
    stages = [e.text for e in events if isinstance(e, w.Preparing)]
    assert any("kernels" in t for t in stages) and kinds.index("Prepared") > kinds.index("Preparing")
    drive(session, events[:-1])
    # the last sweep is done, the report not yet taken in: quitting loses nothing
    assert rec.status == "finishing" and not session.in_progress()
    drive(session, events[-1:])
    assert rec.status == "converged" and session.active is None and session.state() == "ready"
    assert abs(centre_mean(rec.result.field) - HOT / 4) <= 2e-3
    # the history rows the events carried are the run's history
    sweeps = np.concatenate([c.sweep for c in rec.chunks])
    np.testing.assert_array_equal(sweeps, rec.result.history.sweep)
    # red-black SOR's theoretical factor at its ω for the measured radius (Young 1971)
    from relaxtui.solver.young import sor_factor

    assert rec.mu is not None and rec.theory == pytest.approx(sor_factor(rec.mu, run.omega))


def test_pause_step_and_stop_through_the_control(tmp_path):
    # Jacobi to 1e-10 on a 60 x 60 plate takes far more sweeps than the test lets it run
    loaded = load(tmp_path, n=60, method="jacobi", tolerance=1e-10)
    session = Session()
    rec, run = start(session, loaded)
    events: list = []
    session.control.pause()
    t = threading.Thread(target=w.solve_loop, args=(rec.id, run, session.control, loaded.layout, events.append), daemon=True)
    t.start()
    deadline = time.monotonic() + 120
    while not any(isinstance(e, w.Prepared) for e in events):
        assert time.monotonic() < deadline, "preparation"
        time.sleep(0.02)
    drive(session, list(events))
    assert rec.status == "paused"
    time.sleep(0.3)
    assert not any(isinstance(e, w.Progressed) for e in events)  # paused means paused
    session.step()
    while not any(isinstance(e, w.Progressed) for e in events):
        assert time.monotonic() < deadline, "one chunk"
        time.sleep(0.02)
    assert session.toggle_pause() == "running"
    session.stop()
    assert rec.status == "stopping"
    t.join(120)
    assert not t.is_alive()
    drive(session, [e for e in events if not isinstance(e, w.Prepared)])
    assert rec.status == "cancelled" and rec.result.report["status"] == "cancelled"


def test_worker_frames_of_the_residual_and_the_update(tmp_path):
    from relaxtui.tui.sampling import Viewport

    loaded = load(tmp_path, method="jacobi", tolerance=1e-6)
    session = Session()
    vp = Viewport(0, 0, 0, 60, 60, (15, 15))
    rec, run = start(session, loaded, viewport=vp)
    control = session.control
    control.set_view(mode="residual")
    events = []
    w.solve_loop(rec.id, run, control, loaded.layout, events.append)
    frames = [e.frame for e in events if getattr(e, "frame", None) is not None]
    assert frames and all(f.mode == "residual" for f in frames)
    last = frames[-1]
    # the residual frame is the operator's own per-cell residual of the final field (1 px = 1 cell here)
    r = run.operator.residual_field(run.field)
    np.testing.assert_allclose(last.values[:30, :30], r, equal_nan=True)

    # the update view: change between two snapshots per sweep, u_k - u_j over k - j
    snaps = w.Snapshots(loaded.layout, 1)
    fake = SimpleNamespace(view=lambda: field, operator=None)
    field = np.zeros((30, 30))
    assert snaps.values(fake, "update", 10) is None  # one snapshot: no update yet
    field = np.full((30, 30), 3.0)
    np.testing.assert_allclose(snaps.values(fake, "update", 13), 1.0)


def test_a_bad_option_fails_before_any_sweep(tmp_path):
    from relaxtui.errors import UsageError
    from relaxtui.solver.driver import Run

    loaded = load(tmp_path)
    with pytest.raises(UsageError, match="gauss-seidel"):
        Run(loaded.case, operator=loaded.operator, method="gauss-seidel", omega=1.5)


def test_field_release_keeps_the_shown_and_the_latest_runs():
    session = Session(field_budget=10_000)
    recs = []
    for i in range(3):
        run = SimpleNamespace(method="sor", tolerance=1e-3, progress=progress(), status="converged")
        rec = session.begin(run, "the initial guess", False)
        result = SimpleNamespace(field=np.zeros(16), report={"status": "converged"})  # 128 bytes each
        session.finished(rec.id, result, run)
        recs.append(rec)
    session.selected = 1
    session.field_budget = 250
    session.release_fields()
    assert recs[0].result.field is not None and recs[2].result.field is not None
    assert recs[1].result.field is None and "released" in recs[1].problem
    assert math.isclose(sum(r.field_bytes for r in recs), 256)


def wait_events(events, kind, what: str, limit: float = 120.0) -> None:
    """Until an event of ``kind`` has been posted (a guard against hanging, not a speed check)."""
    deadline = time.monotonic() + limit
    while not any(isinstance(e, kind) for e in events):
        assert time.monotonic() < deadline, what
        time.sleep(0.02)


def test_a_stop_signal_saves_the_active_run_and_the_unexported_ones(tmp_path):
    import json
    import signal

    from relaxtui.commands.solve import _Signals

    loaded = load(tmp_path, n=60, method="jacobi", tolerance=1e-10)
    session = Session()
    # run 1: finished (converged to a loose tolerance), never exported -> saved, its status kept
    rec1, run1 = start(session, loaded, method="red-black-sor", tolerance=1e-3)
    events: list = []
    w.solve_loop(rec1.id, run1, session.control, loaded.layout, events.append)
    drive(session, events)
    # run 2: finished and exported with the e key -> left alone
    rec2, run2 = start(session, loaded, method="red-black-sor", tolerance=1e-3)
    events = []
    w.solve_loop(rec2.id, run2, session.control, loaded.layout, events.append)
    drive(session, events)
    session.mark_exported(rec2.id)
    # an earlier session's export of run 1 sits at the default names: an unattended save never replaces it
    (tmp_path / "plate.run1.report.json").write_text("earlier", encoding="utf-8")
    # run 3: Jacobi to 1e-10 on 60 x 60, paused after one chunk: the signal finds it in progress
    rec3, run3 = start(session, loaded)
    session.control.pause()
    session.control.step_once()
    events = []
    t = threading.Thread(target=w.solve_loop, args=(rec3.id, run3, session.control, loaded.layout, events.append),
                         daemon=True)
    t.start()
    wait_events(events, w.Progressed, "one chunk")
    drive(session, list(events))
    assert session.in_progress()

    signals = _Signals(threading.Event())
    signals.handler(signal.SIGHUP, None)  # the first stop signal, as the installed handler would take it
    saved, code = w.save_on_signal(session, signals, tmp_path)
    t.join(120)
    assert not t.is_alive() and session.closing
    assert code == 130  # the latest run was cancelled: relaxtui solve's "interrupted" (solve.exit_code)
    by_id = {s.run_id: s for s in saved}
    assert sorted(by_id) == [1, 3] and [s.run_id for s in saved][0] == 3  # the stopped run first
    assert (tmp_path / "plate.run1.report.json").read_text(encoding="utf-8") == "earlier"
    assert {p.name for p in by_id[1].paths} == {"plate.run1-2.field.npy", "plate.run1-2.history.csv",
                                                  "plate.run1-2.report.json"}
    assert not list(tmp_path.glob("plate.run2*")) and not list(tmp_path.glob(".*.part"))

    stopped = json.loads((tmp_path / "plate.run3.report.json").read_text(encoding="utf-8"))
    # the headless wording (relaxtui.commands.solve: "... (stopped by SIGHUP)"), status cancelled
    assert stopped["status"] == "cancelled" and stopped["message"].endswith(" (stopped by SIGHUP)")
    field = np.load(tmp_path / "plate.run3.field.npy")
    assert field.shape == (60, 60) and field.dtype == np.float64
    # the contract: fixed cells hold their values (the hot top row), interior cells a finite value
    np.testing.assert_array_equal(field[0, 1:-1], HOT)
    assert np.isfinite(field[1:-1, 1:-1]).all()
    rows = (tmp_path / "plate.run3.history.csv").read_text(encoding="utf-8").splitlines()
    assert rows[0] == "sweep,seconds,residual,estimated_error" and int(rows[-1].split(",")[0]) == stopped["sweeps"] > 0

    kept = json.loads((tmp_path / "plate.run1-2.report.json").read_text(encoding="utf-8"))
    assert kept["status"] == "converged" and "stopped by" not in kept["message"]
    # superposition (common practice, see tests/test_tui.py): the centre holds a quarter of the hot value
    assert abs(centre_mean(np.load(tmp_path / "plate.run1-2.field.npy")) - HOT / 4) <= 2e-3


def test_a_stop_signal_while_preparing_writes_nothing_and_starts_no_run(tmp_path):
    import signal

    from relaxtui.commands.solve import _Signals

    loaded = load(tmp_path)
    session = Session()
    rec, run = start(session, loaded)  # never prepared: no worker has taken it up yet
    signals = _Signals(threading.Event())
    signals.handler(signal.SIGTERM, None)
    saved, code = w.save_on_signal(session, signals, tmp_path)
    assert code == 130 and len(saved) == 1 and not saved[0].paths and "preparing" in saved[0].problem
    assert session.control.stopping and not list(tmp_path.glob("plate.run*"))
    # a run begun after the save took its picture is stopped before it sweeps
    session.active = session.control = None
    late = session.begin(SimpleNamespace(method="sor", tolerance=1e-3, cancel=lambda: None), "the initial guess", False)
    assert late.status == "stopping" and session.control.quitting
