"""Export of a finished run from the UI: the form, then a thread that writes the files.

The default names are the ones ``relaxtui solve`` writes for the case
(``<case>.field.npy``, ``<case>.report.json``, ``<case>.history.csv``) with the
run number added (``<case>.run2.field.npy``, ...), so that two runs of one
session never overwrite each other. A stop signal (SIGHUP, SIGTERM, SIGINT) writes every
run not exported yet to these names (:func:`relaxtui.tui.worker.save_on_signal`).
"""

from __future__ import annotations

from relaxtui.tui import worker as w
from relaxtui.tui.dialogs import ExportScreen
from relaxtui.tui.worker import default_names


def ask_export(app) -> None:
    """Open the export form for the shown run (or refuse, saying why)."""
    rec = app.session.shown()
    if rec is None:
        app._refuse("no run to export yet")
        return
    if rec.result is None:
        app._refuse(f"run #{rec.id} is still going: stop it (x) or let it finish, then export")
        return
    if rec.result.field is None:
        app._refuse(f"run #{rec.id}'s field was released to save memory; run it again to export")
        return
    from relaxtui.solver.driver import check_outputs

    def check(out=None, report=None, history=None):
        check_outputs(field=out, report=report, history=history)

    def done(paths):
        if paths:
            app._thread(w.export, rec.result, paths, app._post, rec.id)

    app.push_screen(ExportScreen(f"run #{rec.id}", default_names(app.case.name, rec.id), check), done)
