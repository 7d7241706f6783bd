"""Large pictures: the size limit follows the file and the memory, not Pillow's default pixel limit.

Outside references: the PNG specification (IHDR, IDAT, deflate streams) for the
files written here, and Pillow's own full decode (``np.asarray``) for the strip copy.
"""

from __future__ import annotations

import struct
import zlib

import numpy as np
import pytest
from PIL import Image
from test_picture import GREY, PALETTE, _chunk, write_png

from relaxtui.case import picture
from relaxtui.errors import CaseError


def test_a_picture_above_pillows_default_limit_is_decoded(tmp_path, monkeypatch):
    # Pretend Pillow's default limit were 300 pixels: a 20 x 20 picture would then be a "bomb" to
    # Pillow, but it fits the file and the memory, so it is decoded.
    write_png(tmp_path / "p.png", np.arange(400).reshape(20, 20) % 3, 8, PALETTE, plte=[[0, 0, 0], [255, 0, 0], [0, 0, 255]])
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 300)
    monkeypatch.setattr(picture, "PILLOW_DEFAULT_LIMIT", 300)
    d = picture.decode(tmp_path / "p.png")
    assert d.shape == (20, 20)
    assert Image.MAX_IMAGE_PIXELS == 300  # restored after the decode


def test_declared_size_beyond_what_the_file_can_hold_is_refused(tmp_path):
    # IHDR says 200 000 x 200 000 grey pixels; the file is a few dozen bytes. Deflate expands one
    # byte to at most about 1032 (common practice, from memory), so it cannot hold 40 G pixels.
    png = b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", struct.pack(">IIBBBBB", 200_000, 200_000, 8, GREY, 0, 0, 0))
    png += _chunk(b"IDAT", zlib.compress(b"\x00" * 1000)) + _chunk(b"IEND", b"")
    (tmp_path / "bomb.png").write_bytes(png)
    with pytest.raises(CaseError, match=r"decompression-bomb guard \(200000 x 200000 pixels declared, more than its \d+ bytes"):
        picture.decode(tmp_path / "bomb.png")


def test_a_picture_whose_decoding_does_not_fit_the_memory_is_refused(tmp_path, monkeypatch):
    from relaxtui.solver import memory

    write_png(tmp_path / "g.png", np.zeros((30, 30)), 8, GREY)
    monkeypatch.setattr(memory, "available_bytes", lambda: 1000)
    with pytest.raises(CaseError, match=r"decompression-bomb guard \(decoding 30 x 30 pixels needs about .* more than the"):
        picture.decode(tmp_path / "g.png")


@pytest.mark.parametrize("depth,ctype", [(8, PALETTE), (4, PALETTE), (8, GREY), (16, GREY), (1, GREY)])
def test_strip_copy_equals_pillows_full_decode(tmp_path, monkeypatch, depth, ctype):
    rng = np.random.default_rng(7)
    top = (1 << depth) - 1
    samples = rng.integers(0, top + 1, size=(37, 23))
    plte = rng.integers(0, 256, size=(top + 1, 3)) if ctype == PALETTE else None
    path = tmp_path / "s.png"
    write_png(path, samples, depth, ctype, plte=plte)
    whole = picture.decode(path)
    monkeypatch.setattr(picture, "STRIP_PIXELS", 50)  # strips of 2 rows
    strips = picture.decode(path)
    with Image.open(path) as im:
        ref = np.asarray(im)
    assert np.array_equal(strips.index, whole.index)
    assert np.array_equal(whole.table[whole.index] if whole.table is not None else whole.index,
                          strips.table[strips.index] if strips.table is not None else strips.index)
    if ctype == PALETTE:
        assert np.array_equal(strips.index, ref)
