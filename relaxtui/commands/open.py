"""``relaxtui open CASE.toml``: the terminal UI."""

from __future__ import annotations

from pathlib import Path

from relaxtui.errors import CaseError


def run(args) -> int:
    """``relaxtui open CASE.toml [--method ...] [--omega ...] [--tolerance ...] [--precision ...] [--run]``."""
    path = Path(args.case)
    from relaxtui.case.picture import require_regular_file

    require_regular_file(path, str(args.case), "case file")  # a folder or FIFO: said so, never a hang
    if not path.is_file():
        raise CaseError(f"{args.case}: case file not found")
    from relaxtui.tui.app import RelaxApp

    app = RelaxApp(
        path,
        method=getattr(args, "method", None),
        omega=getattr(args, "omega", None),
        tolerance=getattr(args, "tolerance", None),
        max_sweeps=getattr(args, "max_sweeps", None),
        precision=getattr(args, "precision", None),
        run=getattr(args, "run", False),
    )
    app.run()
    return 0
