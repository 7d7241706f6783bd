"""A run's outputs written as one set (relaxtui.output.atomic.OutputSet).

Every file goes to its temporary first (field, history, picture, VTK, bundle, then the report);
only when all are complete is the previous report removed and are the temporaries renamed, the
report last. The report carries a run id and, under ``outputs``, the SHA-256 of every other file
of the set, so a reader can check that a report describes exactly the files beside it
(relaxtui.output.report.check_against_reports); a set cut short by a kill has no report, never a
report of another run's field. Two runs writing the same paths commit one after the other (a lock
on the folder).
"""

from __future__ import annotations

import os
from pathlib import Path


def write_run_outputs(result, *, out=None, report=None, history=None, picture=None, vtk=None, bundle=None,
                      scale: int = 1, isolines=None, probes=None) -> list[Path]:
    """Write the outputs of a :class:`relaxtui.solver.driver.SolveResult` as one set; returns the paths."""
    from relaxtui.output.atomic import OutputSet, pause_for_tests, write_field_npy, write_json
    from relaxtui.output.report import stamp_outputs

    given = [p for p in (report, out, history, picture, vtk, bundle, probes) if p is not None]
    if not given:
        return []
    pause_for_tests("writing")
    with OutputSet(lock_folder=Path(given[0]).parent) as batch:
        if out is not None:  # streamed from the working array in row strips (no full-size copy), hashed meanwhile
            write_field_npy(out, result.field_shape, result.field_rows, "field")
        if history is not None:
            result.history.to_csv(history)
        if probes is not None:  # case format v1.1: the probe log
            if result.probes is None:
                from relaxtui.errors import UsageError

                raise UsageError("--probes: the case declares no [[probe]]")
            result.probes.to_csv(probes)
        if picture or vtk or bundle:
            from relaxtui.output import fields, pictures

            if picture:
                pictures.write_picture(picture, result.field, result.case, scale=scale, isolines=isolines)
            if vtk:
                fields.write_vtk(vtk, result.field, result.case)
            if bundle:  # the bundle's own copy of the report names the files written before it
                stamp_outputs(result.report, batch.pending, {"field": out, "history": history, "picture": picture,
                                                             "vtk": vtk}, batch.digests)
                fields.write_bundle(bundle, field=result.field, case=result.case, history=result.history,
                                    report=result.report, probes=result.probes)
        stamp_outputs(result.report, batch.pending, {"field": out, "history": history, "picture": picture, "vtk": vtk,
                                                     "bundle": bundle, "probes": probes}, batch.digests)
        if report is not None:
            write_json(report, result.report, "report")
        old_report = [report] if report is not None and os.path.lexists(report) else []
        return batch.commit(first_remove=old_report)
