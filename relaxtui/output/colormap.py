"""The colour scale of relaxtui: an original ramp built in the Oklab colour space.

Oklab is Björn Ottosson's perceptual colour space ("A perceptual color space
for image processing", 2020, https://bottosson.github.io/posts/oklab/). In it,
the Euclidean distance between two colours approximates how different they
look, and ``L`` approximates perceived lightness. The matrices below are the
ones published there (linear sRGB <-> LMS <-> Oklab); the sRGB transfer curve
is the one of IEC 61966-2-1.

The scale (see :func:`build_palette`), "peat to frost", is a smooth curve in
Oklab of this project's own design:

* lightness rises linearly from ``L_START`` (a near-black peat brown) to
  ``L_END`` (a pale frost blue), so the ramp reads dark-to-light in grey print
  and for every kind of colour vision (the tests simulate the three
  dichromacies and check that lightness still rises at every step);
* the hue turns steadily from ``HUE_START`` to ``HUE_END`` degrees the warm
  way round through brown, ochre, olive and sage to frost: no violet, magenta
  or saturated blue anywhere, unlike the common scales of plotting libraries
  (the tests keep it far from them);
* the chroma is a smooth bump, highest at sage green, kept inside the
  sRGB gamut everywhere (no clipping is needed, the tests check it);
* the curve is resampled at equal arc length, so neighbouring entries of the
  256-entry table are (before 8-bit rounding) exactly the same Oklab distance
  apart: equal steps in value look like equal steps in colour.

Everything is computed at import with numpy (well under a millisecond of
work); nothing is copied from any other colour scale.

Public names: :data:`PALETTE` (256 x 3 uint8 sRGB), :data:`PALETTE_OKLAB` (the
exact Oklab targets), :data:`NO_DATA` (the colour :func:`colors` gives NaN),
:func:`colors`, :func:`index`, :func:`nice_ticks`, :func:`format_ticks`,
:data:`RAMP` and :func:`ramp_chars` (a monochrome character ramp), and the
conversions :func:`oklab_to_srgb` / :func:`srgb_to_oklab`.
"""

from __future__ import annotations

import math

import numpy as np

# --- Oklab (Ottosson 2020, published matrices) ------------------------------

# linear sRGB -> LMS
_RGB_TO_LMS = np.array(
    [
        [0.4122214708, 0.5363004264, 0.0514459929],
        [0.2119034982, 0.6806995451, 0.1073969566],
        [0.0883024619, 0.2817188376, 0.6299787005],
    ]
)
# cube-rooted LMS -> Oklab
_LMS_TO_LAB = np.array(
    [
        [0.2104542553, 0.7936177850, -0.0040720468],
        [1.9779984951, -2.4285922050, 0.4505937099],
        [0.0259040371, 0.7827717662, -0.8086757660],
    ]
)
# Oklab -> cube-rooted LMS
_LAB_TO_LMS = np.array(
    [
        [1.0, 0.3963377774, 0.2158037573],
        [1.0, -0.1055613458, -0.0638541728],
        [1.0, -0.0894841775, -1.2914855480],
    ]
)
# LMS -> linear sRGB
_LMS_TO_RGB = np.array(
    [
        [4.0767416621, -3.3077115913, 0.2309699292],
        [-1.2684380046, 2.6097574011, -0.3413193965],
        [-0.0041960863, -0.7034186147, 1.7076147010],
    ]
)


def oklab_to_linear_srgb(lab: np.ndarray) -> np.ndarray:
    """Oklab ``(..., 3)`` -> linear sRGB ``(..., 3)`` (not clipped)."""
    lms = np.asarray(lab, dtype=np.float64) @ _LAB_TO_LMS.T
    return (lms**3) @ _LMS_TO_RGB.T


def linear_srgb_to_oklab(rgb: np.ndarray) -> np.ndarray:
    """Linear sRGB ``(..., 3)`` -> Oklab ``(..., 3)``."""
    lms = np.asarray(rgb, dtype=np.float64) @ _RGB_TO_LMS.T
    return np.cbrt(lms) @ _LMS_TO_LAB.T


def _encode(linear: np.ndarray) -> np.ndarray:
    """sRGB transfer curve (IEC 61966-2-1): linear -> gamma-encoded, in [0, 1]."""
    c = np.clip(linear, 0.0, 1.0)
    return np.where(c <= 0.0031308, 12.92 * c, 1.055 * np.power(c, 1.0 / 2.4) - 0.055)


def _decode(encoded: np.ndarray) -> np.ndarray:
    """Inverse sRGB transfer curve: gamma-encoded [0, 1] -> linear."""
    c = np.asarray(encoded, dtype=np.float64)
    return np.where(c <= 0.04045, c / 12.92, np.power((c + 0.055) / 1.055, 2.4))


def oklab_to_srgb(lab: np.ndarray) -> np.ndarray:
    """Oklab ``(..., 3)`` -> 8-bit sRGB ``(..., 3)`` uint8 (out-of-gamut values clipped)."""
    return np.rint(_encode(oklab_to_linear_srgb(lab)) * 255.0).astype(np.uint8)


def srgb_to_oklab(rgb: np.ndarray) -> np.ndarray:
    """8-bit sRGB ``(..., 3)`` (any integer or float 0..255) -> Oklab ``(..., 3)`` float64."""
    return linear_srgb_to_oklab(_decode(np.asarray(rgb, dtype=np.float64) / 255.0))


# --- the scale ---------------------------------------------------------------

L_START, L_END = 0.25, 0.95  # Oklab lightness at the low and high end
HUE_START, HUE_END = 15.0, 200.0  # degrees of Oklab hue: peat brown -> ochre -> olive -> sage -> frost
CHROMA_BASE, CHROMA_BUMP = 0.035, 0.11  # chroma = base + bump * sin(pi t**CHROMA_SKEW)
CHROMA_SKEW = 1.8  # the bump peaks at t = 0.68 (sage green), where sRGB has room; ochre and olive have less
SIZE = 256


def scale_curve(t: np.ndarray) -> np.ndarray:
    """The scale's curve in Oklab at parameter ``t`` in [0, 1] (before equal-arc resampling)."""
    t = np.asarray(t, dtype=np.float64)
    lightness = L_START + (L_END - L_START) * t
    hue = np.radians(HUE_START + (HUE_END - HUE_START) * t)
    chroma = CHROMA_BASE + CHROMA_BUMP * np.sin(np.pi * t**CHROMA_SKEW)
    return np.stack([lightness, chroma * np.cos(hue), chroma * np.sin(hue)], axis=-1)


def build_palette(size: int = SIZE, fine: int = 4096) -> tuple[np.ndarray, np.ndarray]:
    """Sample the scale at ``size`` points equally spaced in Oklab arc length.

    The curve is evaluated at ``fine`` parameter values, its cumulative arc
    length (Euclidean Oklab distance, i.e. ΔE_ok) is integrated piecewise
    linearly, and ``size`` parameters are chosen at equal arc-length spacing by
    interpolation. Returns ``(oklab, srgb)``: the exact Oklab points
    ``(size, 3)`` float64 and their 8-bit sRGB colours ``(size, 3)`` uint8.
    """
    t_fine = np.linspace(0.0, 1.0, fine)
    pts = scale_curve(t_fine)
    arc = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(pts, axis=0), axis=1))])
    t = np.interp(np.linspace(0.0, arc[-1], size), arc, t_fine)
    lab = scale_curve(t)
    return lab, quantise(lab)


_CORNERS = np.array([[i >> 2 & 1, i >> 1 & 1, i & 1] for i in range(8)], dtype=np.float64)


def quantise(lab: np.ndarray) -> np.ndarray:
    """8-bit sRGB colours of a lightness-increasing Oklab ramp, keeping lightness increasing.

    Each target's exact sRGB value lies in a cube of 8 neighbouring 8-bit
    colours; of those, the one nearest the target (ΔE_ok) whose lightness is
    above the previous entry's is taken (the nearest one when none is). Plain
    rounding can put a dark entry a hair below its predecessor.
    """
    exact = _encode(oklab_to_linear_srgb(lab)) * 255.0
    cands = np.clip(np.floor(exact)[:, None, :] + _CORNERS[None, :, :], 0.0, 255.0)
    cand_lab = srgb_to_oklab(cands)
    dist = np.linalg.norm(cand_lab - np.asarray(lab)[:, None, :], axis=2)
    out = np.empty((len(lab), 3), dtype=np.uint8)
    previous = -math.inf
    for i in range(len(lab)):
        order = np.argsort(dist[i], kind="stable")
        pick = next((k for k in order if cand_lab[i, k, 0] > previous), order[0])
        out[i] = cands[i, pick]
        previous = cand_lab[i, pick, 0]
    return out


PALETTE_OKLAB, PALETTE = build_palette()
PALETTE_OKLAB.setflags(write=False)
PALETTE.setflags(write=False)

# What colors() gives a NaN: a neutral mid grey, a colour the scale never
# takes (every palette entry has chroma >= CHROMA_BASE). Callers that draw
# "no data" differently (transparent, blank) mask NaN themselves.
NO_DATA = np.array([128, 128, 128], dtype=np.uint8)
NO_DATA.setflags(write=False)


def index(t) -> np.ndarray:
    """Palette index (int64) of each value of ``t`` in [0, 1]; -1 for NaN.

    Entry ``i`` is the colour of ``t = i / 255`` exactly; a value is drawn in
    the nearest entry (``rint(t * 255)``). Values outside [0, 1] are clipped.
    """
    t = np.asarray(t, dtype=np.float64)
    nan = np.isnan(t)
    i = np.rint(np.clip(np.where(nan, 0.0, t), 0.0, 1.0) * (SIZE - 1)).astype(np.int64)
    return np.where(nan, -1, i)


def colors(t) -> np.ndarray:
    """uint8 sRGB colours ``(..., 3)`` of values ``t`` in [0, 1] (see :func:`index`).

    NaN gives :data:`NO_DATA`; values outside [0, 1] are clipped to the ends.
    """
    i = index(t)
    return np.where((i < 0)[..., None], NO_DATA, PALETTE[np.maximum(i, 0)])


# --- ticks -------------------------------------------------------------------

_MANTISSAS = (1, 2, 2.5, 5)


def nice_ticks(vmin: float, vmax: float, n: int = 5) -> list[float]:
    """Round tick values inside ``[vmin, vmax]``: at most ``n`` of them, as many as possible.

    The step is 1, 2, 2.5 or 5 times a power of ten (the usual "nice
    numbers", common practice since Heckbert, Graphics Gems, 1990); the ticks are the
    multiples of the step that lie in the range, each the float nearest its
    decimal value (0.3, never 0.30000000000000004). "Inside" allows a slack
    of 1e-9 of the span, so a range computed as 0.1 .. 0.30000000000000004
    still gets its 0.3. The smallest such step giving at most ``n`` ticks is
    chosen. A range of zero width gives
    ``[vmin]``; a range with a non-finite end gives ``[]``.
    """
    if not (math.isfinite(vmin) and math.isfinite(vmax)):
        return []
    lo, hi = (float(vmin), float(vmax)) if vmin <= vmax else (float(vmax), float(vmin))
    n = max(int(n), 1)
    span = hi - lo
    if span <= 1e-12 * max(abs(lo), abs(hi)) or span == 0.0:
        return [lo]
    base = math.floor(math.log10(span / n))
    for exponent in range(base - 1, base + 3):
        for m in _MANTISSAS:
            step = m * 10.0**exponent
            first, last = math.ceil(lo / step - 1e-9), math.floor(hi / step + 1e-9)
            if last - first + 1 <= n:
                return [_decimal(i * m, exponent) for i in range(first, last + 1)]
    return [lo]  # pragma: no cover - the loop always finds a step (span/step shrinks tenfold per exponent)


def _decimal(mantissa: float, exponent: int) -> float:
    value = float(f"{mantissa}e{exponent}")
    return 0.0 if value == 0.0 else value  # no "-0"


def format_ticks(ticks) -> list[str]:
    """Short labels for ticks from :func:`nice_ticks`, all with the same number of decimals.

    Fixed notation with the fewest decimals that tell neighbours apart for
    magnitudes in [1e-4, 1e6); compact exponent notation otherwise.
    """
    ticks = [float(v) for v in ticks]
    if not ticks:
        return []
    big = max(abs(v) for v in ticks)
    if big != 0.0 and not 1e-4 <= big < 1e6:
        return [f"{v:.3g}" for v in ticks]
    for decimals in range(0, 10):
        labels = [f"{v:.{decimals}f}" for v in ticks]
        if all(abs(float(s) - v) <= 1e-9 * max(big, 1e-300) for s, v in zip(labels, ticks)):
            return [f"{0.0:.{decimals}f}" if float(s) == 0.0 else s for s in labels]  # no "-0.0"
    return [f"{v:.6g}" for v in ticks]


# --- characters ----------------------------------------------------------------

# A monochrome ramp from sparse to dense ink, for terminals without colour.
# The blank is kept for "no data" (NO_DATA_CHAR), so the lowest value is a dot.
RAMP = ".,:-=+*o%#@"
NO_DATA_CHAR = " "
_RAMP_ARRAY = np.array(list(RAMP), dtype="<U1")


def ramp_chars(t) -> np.ndarray:
    """One character of :data:`RAMP` per value of ``t`` in [0, 1] (array of ``<U1``).

    The range is cut into ``len(RAMP)`` equal bins (1.0 falls in the last);
    values outside [0, 1] are clipped; NaN gives :data:`NO_DATA_CHAR`.
    """
    t = np.asarray(t, dtype=np.float64)
    nan = np.isnan(t)
    k = len(RAMP)
    i = np.minimum(np.floor(np.clip(np.where(nan, 0.0, t), 0.0, 1.0) * k), k - 1).astype(np.int64)
    return np.where(nan, NO_DATA_CHAR, _RAMP_ARRAY[i])
