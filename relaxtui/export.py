"""Public export functions, kept at their first-release import path.

The implementations live in :mod:`relaxtui.output.atomic` (``flux``, ``pictures``, ``fields``).
"""

from relaxtui.output.fields import HISTORY_COLUMNS, load_field, write_bundle, write_vtk
from relaxtui.output.flux import (
    cell_conductivity,
    domain_mask,
    flux,
    gradient,
    peak_flux,
)
from relaxtui.output.pictures import (
    ISOLINE_OPACITY,
    MAX_PICTURE_PIXELS,
    PictureLayout,
    render_picture,
    write_picture,
)

__all__ = [
    "HISTORY_COLUMNS",
    "ISOLINE_OPACITY",
    "MAX_PICTURE_PIXELS",
    "PictureLayout",
    "cell_conductivity",
    "domain_mask",
    "flux",
    "gradient",
    "load_field",
    "peak_flux",
    "render_picture",
    "write_bundle",
    "write_picture",
    "write_vtk",
]
