"""``relaxtui init MASK.png``: write a starter case file for a picture.

One ``[[region]]`` per distinct colour, most pixels first, each with its pixel
count in a comment. Only the obvious kinds are filled in: the most common
opaque colour becomes ``interior`` and transparent pixels ``outside``. Every
other region's ``kind`` line is left as a comment listing the choices, so the
file does not load until the user has decided (the loader then says
``region N: missing key 'kind'`` with the line).

A picture with more than :data:`MANY_COLOURS` distinct colours is taken for an
anti-aliased drawing: regions are written for the colours that cover at least
:data:`MAIN_SHARE` of the pixels (at most :data:`MANY_COLOURS`), and
``snap = true`` gives the other pixels the nearest of them.
"""

from __future__ import annotations

import os
from pathlib import Path

from relaxtui.case import picture
from relaxtui.case.model import (
    DEFAULT_MAX_SWEEPS,
    DEFAULT_METHOD,
    DEFAULT_OMEGA,
    DEFAULT_TOLERANCE,
)
from relaxtui.errors import OutputError
from relaxtui.output import atomic as output
from relaxtui.solver.methods import METHOD_NAMES  # noqa: F401 - the [solver] comment lists them

MANY_COLOURS = 64
MAIN_SHARE = 0.001

KIND_CHOICES_COMMENT = (
    "# kind = ?    choose one of: interior (conductivity = ..., source = ...), fixed (value = ...), "
    "outside, flux (flux = ...), convection (coefficient = ..., ambient = ...)"
)


def toml_string(text: str) -> str:
    """A TOML basic string for ``text`` (quotes, backslashes and control characters escaped)."""
    out = ['"']
    for ch in text:
        if ch == '"':
            out.append('\\"')
        elif ch == "\\":
            out.append("\\\\")
        elif ch == "\n":
            out.append("\\n")
        elif ch == "\t":
            out.append("\\t")
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    out.append('"')
    return "".join(out)


def starter_text(mask_ref: str, decoded: picture.Decoded, mask_name: str) -> tuple[str, int, int]:
    """The starter TOML for a decoded picture.

    Returns the text, the number of regions written and how many of them
    still need a kind.
    """
    colours, counts = decoded.census()
    rows, cols = decoded.shape
    total = rows * cols
    distinct = len(colours)
    snap = distinct > MANY_COLOURS
    if snap:
        keep = [(c, n) for c, n in zip(colours, counts) if n >= MAIN_SHARE * total or int(c) == int(picture.TRANSPARENT)]
        keep = keep[:MANY_COLOURS]
        if not any(int(c) != int(picture.TRANSPARENT) for c, _ in keep):
            keep.append(next((c, n) for c, n in zip(colours, counts) if int(c) != int(picture.TRANSPARENT)))
    else:
        keep = list(zip(colours, counts))
    kept_pixels = int(sum(int(n) for _, n in keep))

    lines = [
        f"# relaxtui case file, started by `relaxtui init` for {mask_name}",
        f"# ({cols} x {rows} pixels, {distinct} distinct colour{'s' if distinct != 1 else ''}).",
        "# Choose a kind for every region below whose kind line is a comment, add the",
        "# keys that kind needs, then check the case with `relaxtui info THIS_FILE`.",
        "",
        f"title = {toml_string(Path(mask_name).stem)}",
        "# quantity and unit are labels for reports and the UI (temperature in °C,",
        "# potential in V, head in m, ...); give every value below in that unit.",
        'quantity = "temperature"',
        'unit = ""',
        "# mask: the picture, relative to this file.",
        f"mask = {toml_string(mask_ref)}",
        "",
        "# cell_size: the side of one pixel (one square cell), in metres.",
        "cell_size = 1.0",
        "# depth: the out-of-plane thickness, in metres; it scales the reported flows.",
        "depth = 1.0",
        "# snap = true gives each pixel whose colour no region declares the nearest",
        "# declared colour (for anti-aliased drawings); false makes such pixels an error.",
    ]
    if snap:
        lines.append(
            f"# This picture has {distinct} colours: regions are written for the {len(keep)} main ones, "
            f"snap gives the other {total - kept_pixels} pixels the nearest of them."
        )
    lines += [
        f"snap = {'true' if snap else 'false'}",
        "",
        "# Solver defaults; the command line and the UI override them.",
        "[solver]",
        f"method = {toml_string(DEFAULT_METHOD)}   # {' | '.join(METHOD_NAMES)}",
        f"omega = {toml_string(DEFAULT_OMEGA) if isinstance(DEFAULT_OMEGA, str) else DEFAULT_OMEGA}          # a number in (0, 2), or \"auto\"",
        f"tolerance = {DEFAULT_TOLERANCE!r}       # the largest error left in the field, in the unit above",
        f"max_sweeps = {DEFAULT_MAX_SWEEPS}",
    ]

    interior_done = False
    undecided = 0
    for colour, n in keep:
        colour = int(colour)
        name = picture.color_name(colour)
        share = 100.0 * int(n) / total
        lines += ["", f"# {int(n)} pixels ({share:.2f} %)", "[[region]]"]
        lines.append(f"color = {toml_string(name)}")
        if colour == int(picture.TRANSPARENT):
            lines.append('kind = "outside"      # transparent pixels: not part of the problem')
        elif not interior_done:
            interior_done = True
            lines.append('kind = "interior"     # the most common colour; change it if it is not the material')
            lines.append("conductivity = 1.0    # > 0")
            lines.append("source = 0.0          # per unit volume, into the domain")
        else:
            undecided += 1
            lines.append(KIND_CHOICES_COMMENT)
        lines.append('# name = "..."        # optional, unique')
    return "\n".join(lines) + "\n", len(keep), undecided


def run(args) -> int:
    """Handle ``relaxtui init``; returns the exit code."""
    mask = Path(args.mask)
    if mask.is_dir():  # `relaxtui init .`: no picture name to derive the case file's from
        raise OutputError(f"{str(mask)!r} is a folder, not a PNG picture")
    target = Path(args.output) if getattr(args, "output", None) else mask.with_suffix(".toml")
    if target.resolve() == mask.resolve():
        raise OutputError(f"refusing to write the case over the picture {str(mask)!r}; give -o CASE.toml")
    output.check_target(target, "case file")
    if target.exists() and not getattr(args, "force", False):
        raise OutputError(f"{str(target)!r} already exists; use --force to overwrite it")
    decoded = picture.decode(mask)
    try:
        ref = os.path.relpath(mask.resolve(), target.resolve().parent)
    except ValueError:  # another drive (Windows)
        ref = str(mask.resolve())
    ref = ref.replace(os.sep, "/")
    text, count, undecided = starter_text(ref, decoded, mask.name)
    output.write_text(target, text, "case file")
    todo = f"; choose a kind for {undecided} of them" if undecided else ""
    print(f"wrote {target}: {count} region{'s' if count != 1 else ''}{todo}")
    return 0
