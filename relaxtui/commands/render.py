"""``relaxtui render FIELD.npy --case CASE.toml -o FIELD.png``."""

from __future__ import annotations

import os

from relaxtui.output.atomic import check_target
from relaxtui.output.fields import load_field
from relaxtui.output.pictures import has_finite_value, write_picture


def run(args) -> int:
    """``relaxtui render FIELD.npy --case CASE.toml -o FIELD.png [--scale K] [--isolines N]``."""
    target = check_target(args.output, "picture")
    from relaxtui.case import load_case

    case = load_case(args.case)
    from relaxtui.case.picture import require_regular_file
    from relaxtui.commands.solve import check_output_set, warn_if_mismatched

    # the picture never replaces an input: `-o case.toml` used to write a PNG over the case file
    check_output_set({"picture": args.output}, {"case file": args.case, "picture of the case": case.mask_path,
                                                "field": args.field})
    from relaxtui.errors import CaseError, UsageError

    try:
        require_regular_file(args.field, f"field {str(args.field)!r}", "numpy file")
    except CaseError as exc:
        raise UsageError(str(exc)) from None
    field = load_field(args.field, case.shape, what="field")
    warn_if_mismatched(args.field)  # a report beside it that describes another field: a broken output set
    if not has_finite_value(field, case):  # an all-NaN field (a diverged run's, say) draws no picture
        raise UsageError(f"field {str(args.field)!r}: no cell of the domain holds a finite value "
                         "(all NaN or infinite): nothing to draw, no picture written")
    write_picture(target, field, case, scale=getattr(args, "scale", 1) or 1, isolines=getattr(args, "isolines", None))
    print(os.fspath(target))
    return 0
