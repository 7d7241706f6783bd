"""Case loading: the TOML file with line tracking, the picture, the domain checks."""

from relaxtui.case.loader import build_case, load_case

__all__ = ["build_case", "load_case"]
