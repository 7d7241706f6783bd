"""The heatmap renderable and the field sampling behind it, without any app.

Colours are read back from a fixed-width Rich console (``render_lines``): with
the upper half block "▀" a character's foreground is the upper pixel and its
background the lower one. Expected values are computed here independently
(plain numpy block means, the scale position (v - vmin) / (vmax - vmin) mapped
to palette entry rint(255 t) as documented in relaxtui.output.colormap).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from rich.console import Console

from relaxtui.case.model import FIXED, INTERIOR, OUTSIDE
from relaxtui.output import colormap
from relaxtui.tui.heatmap import EDGE_RGB, FIXED_RGB, MONO_FIXED, render_heatmap
from relaxtui.tui.sampling import (
    BLOCKS,
    CellLayout,
    SamplingPlan,
    Viewport,
    centred,
    clamp_viewport,
    fit_zoom,
)


def lines_of(renderable, width=80, color=True):
    console = Console(width=width, color_system="truecolor" if color else None, force_terminal=color, no_color=not color)
    return console.render_lines(renderable, console.options.update(width=width), pad=False)


def cells(line):
    """(char, fg rgb or None, bg rgb or None, style) per character cell of one rendered line."""
    out = []
    for seg in line:
        style = seg.style
        fg = style.color.triplet if style is not None and style.color is not None else None
        bg = style.bgcolor.triplet if style is not None and style.bgcolor is not None else None
        for ch in seg.text:
            out.append((ch, tuple(fg) if fg else None, tuple(bg) if bg else None, style))
    return out


def palette_rgb(t):
    return tuple(int(v) for v in colormap.PALETTE[int(round(min(max(t, 0.0), 1.0) * 255))])


def test_downsampling_is_the_block_mean_and_each_char_holds_two_pixels():
    rng = np.random.default_rng(1)
    a = rng.uniform(0.0, 10.0, size=(24, 16))
    # room for 8 x 12 pixels: 24 x 16 cells need blocks of 2 (16 x 8 > room? 24/2=12 rows, 16/2=8 cols)
    h = render_heatmap(a, width=8, height=6 + 2, legend=True)
    assert h.block == 2 and h.pixel_shape == (12, 8)
    means = a.reshape(12, 2, 8, 2).mean(axis=(1, 3))  # independent block mean
    lo, hi = means.min(), means.max()
    rendered = lines_of(h, width=8)
    for k in range(6):
        row = cells(rendered[k])
        assert len(row) == 8
        for j, (ch, fg, bg, _) in enumerate(row):
            assert ch == "▀"
            assert fg == palette_rgb((means[2 * k, j] - lo) / (hi - lo))
            assert bg == palette_rgb((means[2 * k + 1, j] - lo) / (hi - lo))


def test_small_arrays_are_enlarged_by_a_whole_factor_only_when_asked():
    a = np.arange(6.0).reshape(2, 3)
    big = render_heatmap(a, width=9, height=8)  # 6 map rows = 12 pixels: factor min(12//2, 9//3) = 3
    assert big.magnification == 3 and big.pixel_shape == (6, 9)
    plain = render_heatmap(a, width=9, height=8, magnify=False)
    assert plain.magnification == 1 and plain.pixel_shape == (2, 3)


def test_nan_cells_are_blank_and_the_domain_edge_is_drawn_around_them():
    a = np.full((8, 8), 5.0)
    a[:, :4] = np.nan  # left half not in the domain
    a[0, 7] = 1.0
    a[7, 7] = 9.0
    h = render_heatmap(a, width=8, height=4 + 2, magnify=False)
    rendered = [cells(line) for line in lines_of(h, width=8)[:4]]
    for k in range(4):
        for j in range(3):  # far from the domain: blank, no colour at all
            ch, fg, bg, _ = rendered[k][j]
            assert ch == " " and fg is None and bg is None
        ch, fg, bg, _ = rendered[k][3]  # the column beside the domain: the edge grey, both halves
        assert ch == "▀" and fg == EDGE_RGB and bg == EDGE_RGB
    # top-right pixel is the minimum (t = 0), bottom-right the maximum (t = 1)
    assert rendered[0][7][1] == palette_rgb(0.0)
    assert rendered[3][7][2] == palette_rgb(1.0)


def test_fixed_cells_take_their_own_colour_and_the_legend_names_them():
    a = np.linspace(0.0, 1.0, 64).reshape(8, 8)
    fixed = np.zeros((8, 8), dtype=bool)
    fixed[0, :] = True
    h = render_heatmap(a, width=40, height=4 + 2, fixed=fixed, unit="K", magnify=False)
    rendered = lines_of(h, width=40)
    first = cells(rendered[0])
    assert all(c[1] == FIXED_RGB for c in first[:8])  # upper pixels of the first char row are held
    assert all(c[2] != FIXED_RGB for c in first[:8])
    legend = "".join(c[0] for c in cells(rendered[4]))
    assert "K" in legend and "held" in legend


def test_legend_bar_runs_through_the_scale_and_ticks_are_round_values_at_their_places():
    a = np.linspace(0.0, 100.0, 100).reshape(10, 10)
    width = 41
    h = render_heatmap(a, width=width, height=5 + 2, unit="°C", magnify=False)
    rendered = lines_of(h, width=width)
    bar = cells(rendered[5])
    bar_cells = [c for c in bar if c[0] == " " and c[2] is not None]
    assert bar_cells[0][2] == palette_rgb(0.0) and bar_cells[-1][2] == palette_rgb(1.0)
    assert "".join(c[0] for c in bar).rstrip().endswith("°C")
    ticks = "".join(c[0] for c in cells(rendered[6]))
    bar_width = len(bar_cells)
    # nice_ticks(0, 100, n) gives round values (Heckbert's nice numbers); each label centred under
    # its place (v - vmin) / (vmax - vmin) * (bar_width - 1).
    expected = colormap.nice_ticks(0.0, 100.0, max(2, min(bar_width // 8, 7)))
    assert expected[0] == 0.0 and expected[-1] == 100.0
    labels = colormap.format_ticks(expected)
    for v, text in zip(expected, labels):
        pos = round(v / 100.0 * (bar_width - 1))
        start = min(max(pos - len(text) // 2, 0), bar_width - len(text))
        assert ticks[start : start + len(text)] == text


def test_every_line_fits_the_width():
    rng = np.random.default_rng(2)
    a = rng.normal(size=(333, 517))
    for width, height in ((20, 8), (80, 24), (137, 41)):
        h = render_heatmap(a, width=width, height=height, unit="V")
        rendered = lines_of(h, width=width)
        assert len(rendered) <= height
        assert all(sum(len(s.text) for s in line) <= width for line in rendered)


def test_monochrome_uses_the_character_ramp_and_no_colour():
    a = np.array([[0.0, 0.5, 1.0, np.nan], [0.0, 0.5, 1.0, np.nan]])
    fixed = np.zeros(a.shape, dtype=bool)
    h = render_heatmap(a, width=4, height=1 + 2, mono=True, magnify=False)
    rendered = lines_of(h, width=4, color=False)
    row = cells(rendered[0])
    chars = "".join(c[0] for c in row)
    ramp = colormap.RAMP
    assert chars == ramp[0] + colormap.ramp_chars(0.5).item() + ramp[-1] + " "
    for line in rendered:
        for seg in line:
            assert seg.style is None or (seg.style.color is None and seg.style.bgcolor is None)
    fixed[:, 1] = True
    held = render_heatmap(a, width=4, height=3, mono=True, fixed=fixed, magnify=False)
    assert "".join(c[0] for c in cells(lines_of(held, width=4, color=False)[0]))[1] == MONO_FIXED


def test_monochrome_averages_the_two_pixels_of_a_character():
    a = np.array([[0.0, 0.0], [1.0, np.nan]])
    h = render_heatmap(a, width=2, height=3, mono=True, magnify=False)
    chars = "".join(c[0] for c in cells(lines_of(h, width=2, color=False)[0]))
    # (0 + 1) / 2 = 0.5 on the left; only the upper pixel (0.0) on the right
    assert chars == colormap.ramp_chars(0.5).item() + colormap.RAMP[0]


def test_cursor_is_drawn_in_a_contrasting_colour_and_reverse_video_in_mono():
    a = np.zeros((4, 4))
    a[0, 0] = 1.0
    h = render_heatmap(a, width=4, height=2 + 2, cursor=(1, 2, 1), magnify=False)
    row = cells(lines_of(h, width=4)[0])
    assert row[2][2] == (250, 250, 250)  # lower pixel of char (0, 2) on a dark value: light cursor
    assert row[2][1] == palette_rgb(0.0)
    m = render_heatmap(a, width=4, height=2 + 2, cursor=(1, 2, 1), mono=True, magnify=False)
    row = cells(lines_of(m, width=4, color=False)[0])
    assert row[2][3] is not None and row[2][3].reverse
    assert not (row[1][3] is not None and row[1][3].reverse)


def test_degenerate_inputs_do_not_fail():
    assert "no values yet" in "".join(c[0] for line in lines_of(render_heatmap(np.full((3, 3), np.nan), 20, 5), 20) for c in cells(line))
    flat = render_heatmap(np.full((3, 3), 7.0), 20, 5, magnify=False)
    row = cells(lines_of(flat, 20)[0])
    assert row[0][1] == palette_rgb(0.5)  # a flat field sits mid-scale
    bad = np.array([[np.inf, 1.0], [0.0, 1.0]])
    render_heatmap(bad, 10, 4, domain=np.ones((2, 2), bool))
    with pytest.raises(ValueError):
        render_heatmap(np.zeros(3), 10, 4)


# -- sampling (what the solve worker hands the UI) -------------------------------------


def kinds_plate(rows=64, cols=96):
    k = np.full((rows, cols), INTERIOR, dtype=np.int64)
    k[0, :] = FIXED
    k[:, :5] = OUTSIDE
    return k


def test_zoomed_out_snapshot_is_the_exact_block_mean_of_domain_cells_for_small_blocks():
    kinds = kinds_plate()
    layout = CellLayout(kinds, 0.01)
    rng = np.random.default_rng(3)
    field = rng.uniform(size=kinds.shape)
    field[kinds == OUTSIDE] = 1e9  # must never leak into a mean
    vp = Viewport(0, 0, BLOCKS.index(4), 16, 24)  # blocks of 4 x 4
    values = SamplingPlan(layout, vp).sample(field)
    dom = (kinds == INTERIOR) | (kinds == FIXED)
    sums = np.where(dom, field, 0.0).reshape(16, 4, 24, 4).sum(axis=(1, 3))
    counts = dom.reshape(16, 4, 24, 4).sum(axis=(1, 3))
    expected = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
    np.testing.assert_allclose(values, expected, rtol=1e-12)


def test_large_blocks_are_sampled_within_the_budget_and_thin_channels_survive():
    rows, cols = 512, 512
    kinds = np.full((rows, cols), OUTSIDE, dtype=np.int64)
    kinds[:, 101] = INTERIOR  # a one-cell vertical channel
    kinds[0, 101] = FIXED
    layout = CellLayout(kinds)
    field = np.full((rows, cols), np.nan)
    field[:, 101] = np.arange(rows, dtype=float)
    vp = Viewport(0, 0, BLOCKS.index(32), 16, 16)  # blocks of 32 x 32
    plan = SamplingPlan(layout, vp, budget=16 * 16 * 4)  # 2 x 2 samples per block
    assert plan.s == 2
    values = plan.sample(field)
    assert np.isnan(values[:, [0, 1, 2, 4]]).all()
    column = values[:, 101 // 32]
    assert np.isfinite(column).all()  # every block of the channel shows a value of the channel
    for i, v in enumerate(column):
        assert 32 * i <= v < 32 * (i + 1)
    assert plan.fixed[0, 101 // 32] and not plan.fixed[1:, :].any()


def test_zoomed_in_pixels_repeat_their_cell_and_the_probe_uses_the_contract_position():
    kinds = kinds_plate(10, 12)
    layout = CellLayout(kinds, 0.5)
    field = np.arange(120.0).reshape(10, 12)
    vp = clamp_viewport(Viewport(0, 0, -2, 12, 12, (3, 7)), layout.shape)  # 3 pixels per cell
    plan = SamplingPlan(layout, vp)
    frame = plan.frame(field)
    r0, c0 = vp.row0, vp.col0
    assert frame.values.shape == (12, 12)
    dom = (kinds == INTERIOR) | (kinds == FIXED)
    shown = np.where(dom, field, np.nan)[r0 : r0 + 4, c0 : c0 + 4]
    np.testing.assert_array_equal(frame.values, np.repeat(np.repeat(shown, 3, axis=0), 3, axis=1))
    # contract: the centre of cell (row, col) is x = (col + 0.5) h, y = (rows - row - 0.5) h
    assert frame.probe.row == 3 and frame.probe.col == 7
    assert frame.probe.x == pytest.approx((7 + 0.5) * 0.5)
    assert frame.probe.y == pytest.approx((10 - 3 - 0.5) * 0.5)
    assert frame.probe.value == field[3, 7]
    outside = plan.frame(field, cursor=(3, 2))
    assert outside.probe.value is None


def test_viewport_keeps_the_cursor_in_view_and_the_view_inside_the_grid():
    shape = (300, 500)
    fit = fit_zoom(shape, 40, 60)
    assert BLOCKS[fit] == 12  # 300/12 = 25 <= 40 and 500/12 = 42 <= 60; 500/8 = 63 > 60
    assert fit_zoom((30, 30), 40, 60) == 0 and fit_zoom((10, 10), 40, 60) == -3  # 4 px per cell
    vp = clamp_viewport(Viewport(0, 0, 0, 40, 60, (250, 480)), shape)
    assert vp.row0 <= 250 < vp.row0 + 40 and vp.col0 <= 480 < vp.col0 + 60
    assert vp.row0 + 40 <= 300 and vp.col0 + 60 <= 500
    vp = clamp_viewport(Viewport(0, 0, BLOCKS.index(6), 40, 60, (299, 499)), shape)
    assert vp.block == 6 and vp.row0 % 6 == 0 and vp.col0 % 6 == 0
    assert vp.row0 <= 299 < vp.row0 + 240 and vp.col0 <= 499 < vp.col0 + 360
    c = centred(Viewport(0, 0, 0, 40, 60, (150, 250)), shape)
    assert (c.row0, c.col0) == (130, 220)
    assert clamp_viewport(Viewport(0, 0, 0, 40, 60, (-5, 900)), shape).cursor == (0, 499)


def test_layout_pyramids_mark_any_domain_and_any_fixed_cell_for_every_block_size():
    rng = np.random.default_rng(4)
    kinds = np.where(rng.uniform(size=(37, 53)) < 0.05, INTERIOR, OUTSIDE)
    kinds[rng.uniform(size=kinds.shape) < 0.02] = FIXED
    layout = CellLayout(kinds)
    dom = (kinds == INTERIOR) | (kinds == FIXED)
    assert {1, 2, 3, 4, 6, 8, 12, 16, 24, 32, 48, 64} <= set(layout.blocks)
    for b in layout.blocks:
        if b == 1:
            continue
        h, w = -(-37 // b), -(-53 // b)
        pad = lambda a: np.pad(a, ((0, h * b - 37), (0, w * b - 53)))  # noqa: E731
        # plain block-wise any(), computed here without the pooling chains
        np.testing.assert_array_equal(layout.domain[b], pad(dom).reshape(h, b, w, b).any(axis=(1, 3)))
        np.testing.assert_array_equal(layout.fixed[b], pad(kinds == FIXED).reshape(h, b, w, b).any(axis=(1, 3)))
        rep = layout.rep[b]
        assert ((rep >= 0) == layout.domain[b]).all()
        rr, cc = np.divmod(rep[rep >= 0], 53)
        assert dom[rr, cc].all()  # the representative is a domain cell ...
        bi, bj = np.nonzero(rep >= 0)
        assert ((rr // b == bi) & (cc // b == bj)).all()  # ... of its own block
    assert not math.isnan(layout.position(0, 0)[0])
