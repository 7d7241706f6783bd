"""The package layout's promises (DEVELOPERS.md): no module shadows the standard library."""

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def test_no_module_is_named_after_a_standard_library_module():
    # with a package folder as the working directory, such a module would be imported instead of
    # the standard library's (common practice: never reuse sys.stdlib_module_names)
    clash = [str(p.relative_to(ROOT)) for folder in ("relaxtui", "kernels") for p in (ROOT / folder).rglob("*.py")
             if p.stem in sys.stdlib_module_names]
    assert clash == []
