"""PNG decoding and colour matching (relaxtui.case.picture).

The rules checked here are the contract's, ../shared/case-format.md "The
picture": every PNG flavour (1-bit, grey, grey+alpha, palette, RGB, RGBA,
8 or 16 bit), 16-bit samples reduced by dropping the low byte, alpha 0 (and a
tRNS colour key) meaning "transparent", exact RGB matching, and snap to the
nearest declared colour with ties to the region declared first.

The PNG layout itself (signature, IHDR, PLTE, tRNS, IDAT with one filter byte
per scanline, IEND, CRC-32 over type and data) follows the PNG specification
(ISO/IEC 15948, W3C PNG 2nd edition); :func:`write_png` writes files from it
with zlib, so flavours that Pillow cannot produce are tested too.
"""

from __future__ import annotations

import struct
import zlib

import numpy as np
import pytest
from PIL import Image

from relaxtui.case import picture
from relaxtui.errors import CaseError

# PNG colour types (PNG specification, IHDR).
GREY, RGB, PALETTE, GREY_ALPHA, RGBA = 0, 2, 3, 4, 6


def _chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def write_png(path, samples, depth, ctype, plte=None, trns=None) -> None:
    """Write a PNG from raw samples: ``samples`` is (rows, cols[, channels])
    of integers at ``depth`` bits; ``plte`` an (n, 3) palette; ``trns`` the
    raw tRNS chunk data."""
    s = np.asarray(samples, dtype=np.int64)
    if s.ndim == 2:
        s = s[:, :, None]
    h, w, _ = s.shape
    lines = []
    for r in range(h):
        row = s[r].reshape(-1)
        if depth == 16:
            data = row.astype(">u2").tobytes()
        elif depth == 8:
            data = row.astype(np.uint8).tobytes()
        else:  # 1, 2, 4 bits: pack from the most significant bit
            per = 8 // depth
            pad = (-len(row)) % per
            v = np.concatenate([row, np.zeros(pad, np.int64)]).reshape(-1, per)
            data = (v << (depth * np.arange(per - 1, -1, -1))).sum(axis=1).astype(np.uint8).tobytes()
        lines.append(b"\x00" + data)  # filter type 0 (None)
    png = b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, depth, ctype, 0, 0, 0))
    if plte is not None:
        png += _chunk(b"PLTE", bytes(np.asarray(plte, np.uint8).reshape(-1)))
    if trns is not None:
        png += _chunk(b"tRNS", trns)
    png += _chunk(b"IDAT", zlib.compress(b"".join(lines))) + _chunk(b"IEND", b"")
    with open(path, "wb") as f:
        f.write(png)


def codes_of(path, colours, snap=False):
    decoded = picture.decode(path)
    declared = [picture.parse_color(c) for c in colours]
    return picture.match(decoded, declared, snap=snap, label=str(path))


# A small picture with three "levels" 0, 1, 2 plus (where the flavour allows) transparency.
LEVELS = np.array(
    [
        [0, 0, 1, 1, 2],
        [0, 1, 1, 2, 2],
        [2, 2, 0, 0, 1],
        [1, 0, 2, 1, 0],
    ]
)
BLACK_WHITE = (LEVELS == 2).astype(int)  # two levels for the 1-bit flavours


def test_black_and_white_in_every_flavour(tmp_path):
    """One black/white picture written as each flavour decodes to the same codes."""
    bw = BLACK_WHITE
    expected = bw.astype(np.uint8)  # region 0 black, region 1 white
    files = {
        "grey1": (bw, 1, GREY),
        "grey2": (bw * 3, 2, GREY),
        "grey4": (bw * 15, 4, GREY),
        "grey8": (bw * 255, 8, GREY),
        "grey16": (bw * 65535, 16, GREY),
        "greyalpha8": (np.stack([bw * 255, np.full_like(bw, 255)], -1), 8, GREY_ALPHA),
        "greyalpha16": (np.stack([bw * 65535, np.full_like(bw, 65535)], -1), 16, GREY_ALPHA),
        "rgb8": (np.stack([bw * 255] * 3, -1), 8, RGB),
        "rgb16": (np.stack([bw * 65535] * 3, -1), 16, RGB),
        "rgba8": (np.stack([bw * 255] * 3 + [np.full_like(bw, 255)], -1), 8, RGBA),
        "rgba16": (np.stack([bw * 65535] * 3 + [np.full_like(bw, 65535)], -1), 16, RGBA),
    }
    for name, (samples, depth, ctype) in files.items():
        path = tmp_path / f"{name}.png"
        write_png(path, samples, depth, ctype)
        codes, snapped = codes_of(path, ["#000000", "#ffffff"])
        assert snapped == 0
        np.testing.assert_array_equal(codes, expected, err_msg=name)
    for depth in (1, 2, 4, 8):
        path = tmp_path / f"palette{depth}.png"
        write_png(path, bw, depth, PALETTE, plte=[[0, 0, 0], [255, 255, 255]])
        codes, _ = codes_of(path, ["#000000", "#ffffff"])
        np.testing.assert_array_equal(codes, expected, err_msg=path.name)


def test_pillow_written_flavours_agree(tmp_path):
    """The same colour picture saved by Pillow as P, RGB, RGBA decodes alike;
    and as '1' and 'L' for the grey version."""
    colours = ["#102030", "#ff8000", "#00c0ff"]
    rgb = np.array([[int(c[i : i + 2], 16) for i in (1, 3, 5)] for c in colours], np.uint8)[LEVELS]
    img = Image.fromarray(rgb)
    img.save(tmp_path / "rgb.png")
    img.convert("RGBA").save(tmp_path / "rgba.png")
    img.quantize(colors=3, method=Image.Quantize.MEDIANCUT, dither=Image.Dither.NONE).save(tmp_path / "p.png")
    for name in ("rgb", "rgba", "p"):
        codes, _ = codes_of(tmp_path / f"{name}.png", colours)
        np.testing.assert_array_equal(codes, LEVELS.astype(np.uint8), err_msg=name)
    grey = Image.fromarray((BLACK_WHITE * 255).astype(np.uint8))
    grey.save(tmp_path / "l.png")
    grey.convert("1").save(tmp_path / "one.png")
    with Image.open(tmp_path / "one.png") as im:
        assert im.mode == "1"
    for name in ("l", "one"):
        codes, _ = codes_of(tmp_path / f"{name}.png", ["#000000", "#ffffff"])
        np.testing.assert_array_equal(codes, BLACK_WHITE.astype(np.uint8), err_msg=name)


def test_low_bit_grey_is_scaled_to_8_bits(tmp_path):
    # PNG specification: grey samples of depth < 8 map onto 0..255 by
    # replicating bits (a 2-bit 1 is 85 = 0x55, a 4-bit 5 is 85 too).
    write_png(tmp_path / "g2.png", LEVELS, 2, GREY)
    write_png(tmp_path / "g4.png", LEVELS * 5, 4, GREY)
    for name in ("g2", "g4"):
        codes, _ = codes_of(tmp_path / f"{name}.png", ["#000000", "#555555", "#aaaaaa"])
        np.testing.assert_array_equal(codes, LEVELS.astype(np.uint8), err_msg=name)


def test_16_bit_samples_drop_the_low_byte(tmp_path):
    """0x80FF becomes 0x80, not 0x81 (the contract: drop the low byte, no rounding)."""
    hi = np.array([[0x00, 0x80, 0xFF]])
    noisy = hi * 256 + np.array([[0xFF, 0xFF, 0x00]])
    write_png(tmp_path / "g16.png", noisy, 16, GREY)
    codes, _ = codes_of(tmp_path / "g16.png", ["#000000", "#808080", "#ffffff"])
    np.testing.assert_array_equal(codes, [[0, 1, 2]])
    r = np.array([[0x12FF, 0x3400, 0xFEFF]])
    g = np.array([[0x3401, 0x56FF, 0x0080]])
    b = np.array([[0x5680, 0x7801, 0xFFFF]])
    write_png(tmp_path / "rgb16.png", np.stack([r, g, b], -1), 16, RGB)
    write_png(tmp_path / "rgba16.png", np.stack([r, g, b, np.full_like(r, 0xFFFF)], -1), 16, RGBA)
    for name in ("rgb16", "rgba16"):
        codes, _ = codes_of(tmp_path / f"{name}.png", ["#123456", "#345678", "#fe00ff"])
        np.testing.assert_array_equal(codes, [[0, 1, 2]], err_msg=name)


TRANSPARENT_LEVEL = 2  # in the transparency tests, level 2 is the see-through one


def _expected_transparent():
    # regions: 0 black, 1 white, 2 transparent; level 0 -> black, 1 -> white, 2 -> transparent
    return LEVELS.astype(np.uint8)


def test_transparency_in_every_flavour(tmp_path):
    """Alpha 0 and tRNS colour keys both mean "transparent" (the contract)."""
    lv = LEVELS
    black_white = (lv == 1).astype(int)  # level 1 white, levels 0 and 2 black-ish
    alpha8 = np.where(lv == 2, 0, 255)
    alpha16 = np.where(lv == 2, 0, 65535)
    files = {}
    # grey + tRNS: the key is a grey value of its own (PNG spec: tRNS for colour type 0)
    files["grey2_trns"] = dict(samples=np.choose(lv, [0, 3, 1]), depth=2, ctype=GREY, trns=struct.pack(">H", 1), colours=["#000000", "#ffffff"])
    files["grey8_trns"] = dict(samples=np.choose(lv, [0, 255, 7]), depth=8, ctype=GREY, trns=struct.pack(">H", 7), colours=["#000000", "#ffffff"])
    files["grey16_trns"] = dict(samples=np.choose(lv, [0, 65535, 0x0007]), depth=16, ctype=GREY, trns=struct.pack(">H", 7), colours=["#000000", "#ffffff"])
    files["greyalpha8"] = dict(samples=np.stack([black_white * 255, alpha8], -1), depth=8, ctype=GREY_ALPHA, colours=["#000000", "#ffffff"])
    files["greyalpha16"] = dict(samples=np.stack([black_white * 65535, alpha16], -1), depth=16, ctype=GREY_ALPHA, colours=["#000000", "#ffffff"])
    files["rgba8"] = dict(samples=np.stack([black_white * 255] * 3 + [alpha8], -1), depth=8, ctype=RGBA, colours=["#000000", "#ffffff"])
    files["rgba16"] = dict(samples=np.stack([black_white * 65535] * 3 + [alpha16], -1), depth=16, ctype=RGBA, colours=["#000000", "#ffffff"])
    key = np.array([9, 8, 7])
    rgb8 = np.where((lv == 2)[:, :, None], key, np.stack([black_white * 255] * 3, -1))
    files["rgb8_trns"] = dict(samples=rgb8, depth=8, ctype=RGB, trns=struct.pack(">HHH", 9, 8, 7), colours=["#000000", "#ffffff"])
    key16 = np.array([0x0901, 0x0802, 0x0703])
    rgb16 = np.where((lv == 2)[:, :, None], key16, np.stack([black_white * 65535] * 3, -1))
    files["rgb16_trns"] = dict(samples=rgb16, depth=16, ctype=RGB, trns=struct.pack(">HHH", 0x0901, 0x0802, 0x0703), colours=["#000000", "#ffffff"])
    # palette: entry 2 has alpha 0 (PNG spec: tRNS holds one alpha per palette entry)
    files["palette_trns"] = dict(samples=lv, depth=8, ctype=PALETTE, plte=[[0, 0, 0], [255, 255, 255], [1, 2, 3]], trns=bytes([255, 255, 0]), colours=["#000000", "#ffffff"])
    files["palette4_trns"] = dict(samples=lv, depth=4, ctype=PALETTE, plte=[[0, 0, 0], [255, 255, 255], [1, 2, 3]], trns=bytes([255, 255, 0]), colours=["#000000", "#ffffff"])
    files["palette_trns_first"] = dict(samples=np.choose(lv, [1, 2, 0]), depth=8, ctype=PALETTE, plte=[[5, 5, 5], [0, 0, 0], [255, 255, 255]], trns=bytes([0]), colours=["#000000", "#ffffff"])
    for name, f in files.items():
        path = tmp_path / f"{name}.png"
        write_png(path, f["samples"], f["depth"], f["ctype"], plte=f.get("plte"), trns=f.get("trns"))
        codes, _ = codes_of(path, f["colours"] + ["transparent"])
        np.testing.assert_array_equal(codes, _expected_transparent(), err_msg=name)


def test_16_bit_colour_key_compares_all_16_bits(tmp_path):
    """A tRNS key of a 16-bit RGB picture matches only the exact 16-bit colour;
    a pixel that differs in a low byte stays opaque (PNG specification, tRNS)."""
    px = np.array([[[0x1234, 0x5678, 0x9ABC], [0x1235, 0x5678, 0x9ABC], [0x12FF, 0x5600, 0x9A00]]])
    write_png(tmp_path / "k.png", px, 16, RGB, trns=struct.pack(">HHH", 0x1234, 0x5678, 0x9ABC))
    codes, _ = codes_of(tmp_path / "k.png", ["#12569a", "transparent"])
    np.testing.assert_array_equal(codes, [[1, 0, 0]])
    # 16-bit grey key: likewise exact on 16 bits
    g = np.array([[0x4000, 0x4001, 0x40FF]])
    write_png(tmp_path / "g.png", g, 16, GREY, trns=struct.pack(">H", 0x4001))
    codes, _ = codes_of(tmp_path / "g.png", ["#404040", "transparent"])
    np.testing.assert_array_equal(codes, [[0, 1, 0]])


def test_partial_alpha_matches_on_rgb(tmp_path):
    # The contract: only alpha 0 is "transparent"; any other pixel is matched on RGB alone.
    a = np.array([[[10, 20, 30, 1], [10, 20, 30, 128], [10, 20, 30, 255], [99, 99, 99, 0]]])
    write_png(tmp_path / "a.png", a, 8, RGBA)
    codes, _ = codes_of(tmp_path / "a.png", ["#0a141e", "transparent"])
    np.testing.assert_array_equal(codes, [[0, 0, 0, 1]])


def test_16_bit_alpha_is_reduced_before_the_alpha_test(tmp_path):
    # The contract reduces 16-bit samples to 8 bits first: alpha 0x00FF becomes 0, so transparent.
    a = np.array([[[0, 0, 0, 0x00FF], [0, 0, 0, 0x0100]]])
    write_png(tmp_path / "a.png", a, 16, RGBA)
    codes, _ = codes_of(tmp_path / "a.png", ["#000000", "transparent"])
    np.testing.assert_array_equal(codes, [[1, 0]])


def unmatched_message(tmp_path, rgb):
    """The error a picture with colours no region matches (only "#000000" declared) raises; it is one line."""
    Image.fromarray(rgb).save(tmp_path / "u.png")
    with pytest.raises(CaseError) as err:
        codes_of(tmp_path / "u.png", ["#000000"])
    msg = str(err.value)
    assert "\n" not in msg
    return msg


def test_unmatched_colours_are_listed(tmp_path):
    rgb = np.zeros((3, 4, 3), np.uint8)
    rgb[1, 2] = (0x12, 0x34, 0x56)
    rgb[2, 0:3] = (0xAB, 0xCD, 0xEF)
    msg = unmatched_message(tmp_path, rgb)
    assert "2 colours match no region" in msg
    assert "#123456 in 1 pixels (first at row 1, column 2)" in msg
    assert "#abcdef in 3 pixels (first at row 2, column 0)" in msg
    assert msg.index("#abcdef") < msg.index("#123456")  # most pixels first
    assert "snap = true" in msg


def test_many_unmatched_colours_are_each_listed_on_one_line(tmp_path):
    # docs/case-format.md section 1: the error "lists each such colour, its pixel count and one pixel
    # where it occurs"; no cap, however many colours (here 5000, each counted against a numpy tally)
    rows, cols = 50, 120
    rgb = np.zeros((rows, cols, 3), np.uint8)
    n = np.arange(rows * cols).reshape(rows, cols) % 5000 + 1  # colour k at flat pixels k-1 and k-1+5000 (k <= 1000)
    rgb[:, :, 0] = n & 255
    rgb[:, :, 1] = n >> 8
    msg = unmatched_message(tmp_path, rgb)
    assert "5000 colours match no region" in msg
    assert "more colours" not in msg
    listed = msg.split("): ", 1)[1].split("; ")
    assert len(listed) == 5000
    flat = n.reshape(-1)
    for k in (1, 999, 1000, 1001, 4999, 5000):
        first = int(np.flatnonzero(flat == k)[0])
        count = int((flat == k).sum())
        name = f"#{k & 255:02x}{k >> 8:02x}00"
        assert f"{name} in {count} pixels (first at row {first // cols}, column {first % cols})" in listed
    # most pixels first, then by packed colour (the existing order)
    assert all(" in 2 pixels " in p for p in listed[:1000])
    assert all(" in 1 pixels " in p for p in listed[1000:])


def test_transparent_pixels_need_a_transparent_region_even_with_snap(tmp_path):
    a = np.zeros((2, 3, 4), np.uint8)
    a[:, :, 3] = 255
    a[1, 1, 3] = 0
    Image.fromarray(a, "RGBA").save(tmp_path / "t.png")
    for snap in (False, True):
        with pytest.raises(CaseError, match=r"1 transparent pixels \(alpha 0\) match no region, first at row 1, column 1"):
            codes_of(tmp_path / "t.png", ["#000000"], snap=snap)


def test_snap_nearest_and_count(tmp_path):
    rgb = np.array([[[0, 0, 0], [10, 10, 10], [250, 240, 255], [200, 0, 0], [255, 255, 255]]], np.uint8)
    Image.fromarray(rgb).save(tmp_path / "s.png")
    codes, snapped = codes_of(tmp_path / "s.png", ["#000000", "#ffffff", "#ff0000"], snap=True)
    # Euclidean distance in RGB (the contract): (200,0,0) is 55 from red, 200 from black
    np.testing.assert_array_equal(codes, [[0, 0, 1, 2, 1]])
    assert snapped == 3


def test_snap_ties_go_to_the_region_declared_first(tmp_path):
    rgb = np.array([[[1, 1, 1], [0, 0, 0], [2, 2, 2]]], np.uint8)  # (1,1,1) is as far from #000000 as from #020202
    Image.fromarray(rgb).save(tmp_path / "tie.png")
    codes, snapped = codes_of(tmp_path / "tie.png", ["#000000", "#020202"], snap=True)
    np.testing.assert_array_equal(codes, [[0, 0, 1]])
    assert snapped == 1
    codes, _ = codes_of(tmp_path / "tie.png", ["#020202", "#000000"], snap=True)
    np.testing.assert_array_equal(codes, [[0, 1, 0]])


def test_snap_never_targets_transparent(tmp_path):
    a = np.array([[[0, 0, 0, 0], [3, 3, 3, 255], [200, 10, 10, 255]]], np.uint8)
    Image.fromarray(a, "RGBA").save(tmp_path / "t.png")
    # "transparent" is declared first, and a transparent pixel's RGB (0,0,0) is closest
    # to (3,3,3); still the opaque pixels snap to the only opaque colour.
    codes, snapped = codes_of(tmp_path / "t.png", ["transparent", "#ff0000"], snap=True)
    np.testing.assert_array_equal(codes, [[0, 1, 1]])
    assert snapped == 2
    with pytest.raises(CaseError, match="snap needs at least one declared colour"):
        codes_of(tmp_path / "t.png", ["transparent"], snap=True)


def test_snap_works_on_palette_pictures(tmp_path):
    write_png(tmp_path / "p.png", LEVELS, 8, PALETTE, plte=[[0, 0, 0], [250, 250, 250], [120, 0, 0]])
    codes, snapped = codes_of(tmp_path / "p.png", ["#000000", "#ffffff", "#ff0000"], snap=True)
    np.testing.assert_array_equal(codes, np.choose(LEVELS, [0, 1, 0]))  # (120,0,0) is 120 from black, 135 from red
    assert snapped == int((LEVELS != 0).sum())


def test_colour_names_case_insensitive():
    assert picture.parse_color("#FFaa00") == picture.parse_color("#ffaa00")
    assert picture.color_name(picture.parse_color("#FFaa00")) == "#ffaa00"
    assert picture.parse_color("Transparent") == int(picture.TRANSPARENT)
    for bad in ("red", "#fff", "#ff00000", "#gg0000", "ff0000", "#ff 000", "#+f0000"):
        assert picture.parse_color(bad) is None, bad


@pytest.mark.parametrize(
    "content, message",
    [
        (b"", "not a PNG picture"),
        (b"GIF89a\x01\x00\x01\x00", "not a PNG picture"),
        (b"\x89PNG\r\n\x1a\n\x00\x00\x00\x0dIHDR", "broken PNG picture"),
    ],
)
def test_broken_files(tmp_path, content, message):
    p = tmp_path / "bad.png"
    p.write_bytes(content)
    with pytest.raises(CaseError, match=message) as err:
        picture.decode(p)
    assert str(p) in str(err.value)


def test_truncated_png(tmp_path):
    write_png(tmp_path / "ok.png", np.zeros((40, 40)), 8, GREY)
    data = (tmp_path / "ok.png").read_bytes()
    (tmp_path / "cut.png").write_bytes(data[: len(data) // 2])
    with pytest.raises(CaseError, match="broken PNG picture"):
        picture.decode(tmp_path / "cut.png")
    bad = bytearray(data)
    bad[45] ^= 0xFF  # inside the IDAT data: zlib stream or CRC no longer valid
    (tmp_path / "crc.png").write_bytes(bytes(bad))
    with pytest.raises(CaseError, match="broken PNG picture"):
        picture.decode(tmp_path / "crc.png")


def test_other_formats_are_refused(tmp_path):
    Image.new("RGB", (4, 4)).save(tmp_path / "x.png", format="BMP")
    with pytest.raises(CaseError, match="not a PNG picture"):
        picture.decode(tmp_path / "x.png")


def test_missing_picture(tmp_path):
    with pytest.raises(CaseError, match="picture not found"):
        picture.decode(tmp_path / "nope.png")


def test_decompression_bomb_guard_is_a_case_error(tmp_path, monkeypatch):
    write_png(tmp_path / "big.png", np.zeros((20, 20)), 8, GREY)
    # Pillow warns above Image.MAX_IMAGE_PIXELS and refuses above twice that;
    # the test lowers the limit instead of drawing a huge picture.
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 300)
    with pytest.raises(CaseError, match="decompression-bomb guard"):
        picture.decode(tmp_path / "big.png")
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 100)
    with pytest.raises(CaseError, match="decompression-bomb guard"):
        picture.decode(tmp_path / "big.png")


def test_header_is_read_without_decoding(tmp_path):
    write_png(tmp_path / "h.png", np.zeros((3, 7, 3)), 16, RGB)
    h = picture.read_header(tmp_path / "h.png")
    assert (h.width, h.height, h.bit_depth, h.color_type) == (7, 3, 16, RGB)


def test_census_counts_colours_most_common_first(tmp_path):
    write_png(tmp_path / "p.png", LEVELS, 8, PALETTE, plte=[[0, 0, 0], [9, 9, 9], [0, 0, 0]])
    colours, counts = picture.decode(tmp_path / "p.png").census()
    # palette entries 0 and 2 are the same colour: counted together
    assert [picture.color_name(c) for c in colours] == ["#000000", "#090909"]
    assert counts.tolist() == [int((LEVELS != 1).sum()), int((LEVELS == 1).sum())]
