"""The colour scale: Oklab construction, uniformity, ticks and the character ramp."""

import math

import numpy as np
import pytest

from relaxtui.output import colormap as cm


def _lab_of_palette():
    return cm.srgb_to_oklab(cm.PALETTE)


# --- the Oklab conversion itself ----------------------------------------------


def test_oklab_reference_values():
    # Ottosson, "A perceptual color space for image processing" (2020): the
    # space is built so that sRGB white is L = 1, a = b = 0. The value for
    # sRGB red, Oklab (0.62796, 0.22486, 0.12585), is quoted from memory (it
    # is the worked value in CSS Color 4's Oklab examples).
    assert cm.srgb_to_oklab(np.array([255, 255, 255])) == pytest.approx([1.0, 0.0, 0.0], abs=1e-4)
    assert cm.srgb_to_oklab(np.array([0, 0, 0])) == pytest.approx([0.0, 0.0, 0.0], abs=1e-9)
    assert cm.srgb_to_oklab(np.array([255, 0, 0])) == pytest.approx([0.62796, 0.22486, 0.12585], abs=1e-4)


def test_oklab_round_trip():
    # The published forward and inverse matrices are inverses (Ottosson 2020):
    # every 8-bit colour comes back to itself.
    rng = np.random.default_rng(3)
    rgb = rng.integers(0, 256, size=(500, 3)).astype(np.uint8)
    assert np.array_equal(cm.oklab_to_srgb(cm.srgb_to_oklab(rgb)), rgb)


# --- the palette ------------------------------------------------------------------


def test_palette_shape_and_read_only():
    assert cm.PALETTE.shape == (256, 3) and cm.PALETTE.dtype == np.uint8
    assert cm.PALETTE_OKLAB.shape == (256, 3)
    with pytest.raises(ValueError):
        cm.PALETTE[0, 0] = 1


def test_lightness_strictly_increasing():
    # Perceptual ordering: Oklab L measured on the 8-bit colours themselves.
    lightness = _lab_of_palette()[:, 0]
    assert np.all(np.diff(lightness) > 0)
    assert np.all(np.diff(cm.PALETTE_OKLAB[:, 0]) > 0)


def test_targets_inside_srgb_gamut():
    # No entry needs clipping: its exact Oklab point is a displayable sRGB colour.
    linear = cm.oklab_to_linear_srgb(cm.PALETTE_OKLAB)
    assert linear.min() >= 0.0 and linear.max() <= 1.0


def test_adjacent_steps_equal_in_oklab():
    # Uniformity: Euclidean Oklab distance (ΔE_ok, Ottosson 2020) between
    # neighbouring entries. The exact targets are equal-arc-length samples, so
    # their steps agree to 1 %.
    steps = np.linalg.norm(np.diff(cm.PALETTE_OKLAB, axis=0), axis=1)
    assert np.abs(steps / steps.mean() - 1).max() < 0.01


def test_eight_bit_palette_stays_uniform():
    # After rounding to 8 bits each entry stays within rounding distance of its
    # target (half a code value per channel is at most ~0.002 ΔE_ok at the dark
    # end), so adjacent 8-bit steps scatter around the mean; over four entries
    # the steps agree within 20 %.
    lab = _lab_of_palette()
    assert np.linalg.norm(lab - cm.PALETTE_OKLAB, axis=1).max() < 0.0025
    steps = np.linalg.norm(lab[4:] - lab[:-4], axis=1)
    assert np.abs(steps / steps.mean() - 1).max() < 0.20
    # and no two adjacent entries are the same colour
    assert np.all(np.any(np.diff(cm.PALETTE.astype(int), axis=0) != 0, axis=1))


def test_endpoints_and_hue_path():
    lab = _lab_of_palette()
    assert lab[0, 0] == pytest.approx(cm.L_START, abs=0.003)
    assert lab[-1, 0] == pytest.approx(cm.L_END, abs=0.003)
    assert cm.PALETTE_OKLAB[0] == pytest.approx(cm.scale_curve(0.0))
    assert cm.PALETTE_OKLAB[-1] == pytest.approx(cm.scale_curve(1.0))
    # the hue turns one way, smoothly, from HUE_START to HUE_END
    hue = np.degrees(np.unwrap(np.arctan2(cm.PALETTE_OKLAB[:, 2], cm.PALETTE_OKLAB[:, 1])))
    hue += 360.0 * round((cm.HUE_START - hue[0]) / 360.0)
    assert hue[0] == pytest.approx(cm.HUE_START) and hue[-1] == pytest.approx(cm.HUE_END)
    turn = np.diff(hue)
    assert np.all(turn > 0) and turn.max() < 3 * turn.mean()
    # every entry is clearly coloured, unlike the no-data grey
    chroma = np.hypot(cm.PALETTE_OKLAB[:, 1], cm.PALETTE_OKLAB[:, 2])
    assert chroma.min() >= cm.CHROMA_BASE - 1e-12
    assert not np.any(np.all(cm.PALETTE == cm.NO_DATA, axis=1))


def test_colors_mapping():
    t = np.array([[0.0, 1.0], [0.5, np.nan]])
    out = cm.colors(t)
    assert out.shape == (2, 2, 3) and out.dtype == np.uint8
    assert np.array_equal(out[0, 0], cm.PALETTE[0])
    assert np.array_equal(out[0, 1], cm.PALETTE[255])
    assert np.array_equal(out[1, 0], cm.PALETTE[128])  # rint(0.5 * 255) = 128
    assert np.array_equal(out[1, 1], cm.NO_DATA)
    # entry i is the colour of t = i / 255; out-of-range values clip to the ends
    i = np.arange(256)
    assert np.array_equal(cm.index(i / 255.0), i)
    assert np.array_equal(cm.colors([-3.0, 7.0]), cm.PALETTE[[0, 255]])
    assert cm.index(np.nan) == -1


# --- ticks ------------------------------------------------------------------------


def _is_round_step(step):
    exponent = math.floor(math.log10(step))
    mantissa = step / 10.0**exponent
    return any(abs(mantissa - m) < 1e-6 for m in (1.0, 2.0, 2.5, 5.0, 10.0))


@pytest.mark.parametrize("draw", range(5))
def test_nice_ticks_round_and_inside(draw):
    # "Nice numbers" for axis labels (Heckbert, Graphics Gems 1990; common
    # practice): steps of 1, 2, 2.5 or 5 times a power of ten, ticks at
    # multiples of the step, all inside the range.
    rng = np.random.default_rng(draw)
    for _ in range(200):
        span = 10.0 ** rng.uniform(-6, 6)
        lo = rng.uniform(-1000, 1000) * span  # ranges up to 1e3 spans away from 0
        hi = lo + span
        n = int(rng.integers(2, 9))
        ticks = cm.nice_ticks(lo, hi, n)
        assert 1 <= len(ticks) <= n
        slack = 1e-9 * span
        assert all(lo - slack <= v <= hi + slack for v in ticks), (lo, hi, ticks)
        if len(ticks) >= 2:
            step = ticks[1] - ticks[0]
            assert _is_round_step(step), (lo, hi, ticks)
            assert np.allclose(np.diff(ticks), step, rtol=1e-6)
            assert all(abs(v / step - round(v / step)) < 1e-6 for v in ticks)
            # the smallest round step that fits: the next finer one would give more than n ticks
            finer = [m * 10.0**e for e in range(-8, 9) for m in (1, 2, 2.5, 5) if m * 10.0**e < step * (1 - 1e-9)]
            f = max(finer)
            assert math.floor(hi / f + 1e-9) - math.ceil(lo / f - 1e-9) + 1 > n


def test_nice_ticks_examples():
    # Worked by hand: 0..1 in fives is quarters; 20..60 in tens; decimals exact.
    assert cm.nice_ticks(0.0, 1.0) == [0.0, 0.25, 0.5, 0.75, 1.0]
    assert cm.nice_ticks(20.0, 60.0) == [20.0, 30.0, 40.0, 50.0, 60.0]
    assert cm.nice_ticks(0.1, 0.35) == [0.1, 0.2, 0.3]
    assert cm.nice_ticks(60.0, 20.0) == cm.nice_ticks(20.0, 60.0)
    assert cm.nice_ticks(5.0, 5.0) == [5.0]
    assert cm.nice_ticks(0.0, float("nan")) == []
    assert cm.format_ticks(cm.nice_ticks(0.0, 1.0)) == ["0.00", "0.25", "0.50", "0.75", "1.00"]
    assert cm.format_ticks([-1.0, -0.5, 0.0]) == ["-1.0", "-0.5", "0.0"]
    assert cm.format_ticks([1e6, 2e6]) == ["1e+06", "2e+06"]


# --- the character ramp -------------------------------------------------------------


def test_ramp_chars():
    k = len(cm.RAMP)
    assert len(set(cm.RAMP)) == k and cm.NO_DATA_CHAR not in cm.RAMP
    out = cm.ramp_chars([0.0, 1.0, np.nan, -1.0, 2.0])
    assert list(out) == [cm.RAMP[0], cm.RAMP[-1], cm.NO_DATA_CHAR, cm.RAMP[0], cm.RAMP[-1]]
    # equal bins: the centre of bin j gives character j
    centres = (np.arange(k) + 0.5) / k
    assert "".join(cm.ramp_chars(centres)) == cm.RAMP


# --- an original scale, readable with every kind of colour vision ----------------------------

# Dichromacy simulation matrices of Machado, Oliveira & Fernandes, "A physiologically-based
# model for simulation of color vision deficiency", IEEE TVCG 15(6), 2009, severity 1.0,
# applied to linear RGB (values from memory).
_DICHROMACY = {
    "protanopia": [[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216], [-0.003882, -0.048116, 1.051998]],
    "deuteranopia": [[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413], [-0.011820, 0.042940, 0.968881]],
    "tritanopia": [[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602], [0.004733, 0.691367, 0.303900]],
}


@pytest.mark.parametrize("kind", sorted(_DICHROMACY))
def test_lightness_rises_for_dichromats(kind):
    def seen(linear):
        return cm.linear_srgb_to_oklab(np.clip(linear @ np.array(_DICHROMACY[kind]).T, 0.0, 1.0))

    # the design: the exact targets, as a dichromat sees them, rise in lightness at every step
    exact = seen(cm.oklab_to_linear_srgb(cm.PALETTE_OKLAB))
    assert np.all(np.diff(exact[:, 0]) > 0), kind
    assert exact[-1, 0] - exact[0, 0] > 0.6
    # the 8-bit table: lightness rises over every four entries, and neighbours that far apart
    # stay distinguishable (ΔE_ok well above the 8-bit rounding noise)
    lab = seen(cm._decode(cm.PALETTE.astype(np.float64) / 255.0))
    assert np.all(lab[4:, 0] - lab[:-4, 0] > 0), kind
    assert np.linalg.norm(lab[4:] - lab[:-4], axis=1).min() > 0.005


# Anchor colours (t = 0, 1/4, 1/2, 3/4, 1) of widely used plotting-library scales, from memory
# (hex values as those libraries publish them, rounded).
_COMMON_SCALES = {
    "blue-green-yellow": ["#440154", "#3b528b", "#21918c", "#5ec962", "#fde725"],
    "black-purple-orange-cream": ["#000004", "#51127c", "#b73779", "#fc8961", "#fcfdbf"],
    "black-purple-red-yellow": ["#000004", "#57106e", "#bc3754", "#f98e09", "#fcffa4"],
    "blue-magenta-yellow": ["#0d0887", "#7e03a8", "#cc4778", "#f89540", "#f0f921"],
    "navy-grey-yellow": ["#00224e", "#414d6b", "#7c7b78", "#bcaf6f", "#fee838"],
    "rainbow": ["#30123b", "#28bceb", "#a4fc3c", "#fb7e21", "#7a0403"],
    "grey": ["#000000", "#404040", "#808080", "#bfbfbf", "#ffffff"],
}


@pytest.mark.parametrize("name", sorted(_COMMON_SCALES))
def test_scale_is_far_from_common_scales(name):
    ours = cm.srgb_to_oklab(cm.PALETTE[[0, 64, 128, 191, 255]])
    theirs = cm.srgb_to_oklab(np.array([[int(h[i : i + 2], 16) for i in (1, 3, 5)] for h in _COMMON_SCALES[name]]))
    # mean Oklab distance over the anchors; about 0.02 is a just-noticeable difference (Ottosson 2020, common practice)
    assert np.linalg.norm(ours - theirs, axis=1).mean() > 0.08, name
    # and the middle colours, where scales differ most, are clearly apart
    assert np.linalg.norm(ours[1:4] - theirs[1:4], axis=1).min() > 0.05, name
