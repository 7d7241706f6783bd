"""PNG pictures: decoding every flavour, and matching colours to regions.

Decoding goes through Pillow and ends in a :class:`Decoded` picture: an index per pixel plus a table of *packed
colours*. A packed colour is a ``uint32``: ``r | g << 8 | b << 16`` for an
opaque pixel, and :data:`TRANSPARENT` (bit 24 alone) for a pixel whose alpha
is 0, whatever its RGB. Matching then works on the few distinct colours, not
on each pixel, so a 4096 x 4096 picture takes a fraction of a second.

Size limit: Pillow's default decompression-bomb guard (about 179 M pixels) is
replaced by this module's own (:func:`_guard`): a picture is refused when its
declared pixels are more than its compressed bytes could hold (deflate packs
at most about 1032:1) or when decoding them would not fit the available
memory; a limit set on ``PIL.Image.MAX_IMAGE_PIXELS`` by the user still holds.
Large palette and grey pictures are copied out of Pillow in row strips, so a
decode holds Pillow's buffer and the index array, about 2 bytes per pixel.

Flavours (the contract, ../shared/case-format.md "The picture"):

* 1-, 2-, 4-, 8-bit grey: samples scaled to 0..255 (Pillow does it; a 2-bit 3
  becomes 255); a ``tRNS`` grey key is compared in the file's own depth.
* 16-bit grey (Pillow mode ``I;16``): the key is compared on all 16 bits, then
  the low byte is dropped.
* grey+alpha 8 bit (``LA``) and 16 bit (Pillow gives ``RGBA`` with the high
  bytes), RGBA 8 and 16 bit: alpha 0 after dropping the low byte is transparent.
* palette (1/2/4/8 bit) with or without ``tRNS`` (one alpha per entry).
* RGB 8 bit, and 16 bit (Pillow keeps the high bytes); a ``tRNS`` colour key
  of a 16-bit picture is compared on all 16 bits of each sample, so the low
  bytes are decoded too.
"""

from __future__ import annotations

import struct
import threading
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from relaxtui.errors import CaseError

TRANSPARENT = np.uint32(1 << 24)
UNMATCHED = 255  # code of a pixel no region claims (regions are 0..254)
MAX_REGIONS = 255
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
_SNAP_CHUNK = 4096  # unmatched colours compared with the declared ones per step (U x R x 3 int64)
PILLOW_DEFAULT_LIMIT = 1024 * 1024 * 1024 // 4 // 3  # PIL.Image.MAX_IMAGE_PIXELS unless someone changed it
DEFLATE_RATIO = 1032  # the most bytes one byte of a deflate stream can expand to (common practice, from memory)
STRIP_PIXELS = 1 << 22  # pixels copied out of Pillow per strip for large pictures
# Peak bytes per pixel while decoding a flavour (Pillow's buffer, the copies made here, the index).
DECODE_BYTES = {0: 4, 2: 24, 3: 4, 4: 16, 6: 20}
_LIMIT_LOCK = threading.Lock()


def pack_rgb(r: int, g: int, b: int) -> int:
    return int(r) | int(g) << 8 | int(b) << 16


def parse_color(text: str) -> int | None:
    """``'#rrggbb'`` (any case) -> packed colour; ``'transparent'`` -> TRANSPARENT; else None."""
    t = text.lower()
    if t == "transparent":
        return int(TRANSPARENT)
    if len(t) == 7 and t[0] == "#" and all(ch in "0123456789abcdef" for ch in t[1:]):
        v = int(t[1:], 16)
        return pack_rgb(v >> 16 & 255, v >> 8 & 255, v & 255)
    return None


def color_name(packed: int) -> str:
    """Packed colour -> ``'#rrggbb'`` or ``'transparent'``."""
    packed = int(packed)
    if packed & int(TRANSPARENT):
        return "transparent"
    return f"#{packed & 255:02x}{packed >> 8 & 255:02x}{packed >> 16 & 255:02x}"


@dataclass(frozen=True)
class Header:
    """What the PNG header says, read without decoding pixels."""

    width: int
    height: int
    bit_depth: int
    color_type: int  # 0 grey, 2 RGB, 3 palette, 4 grey+alpha, 6 RGBA


@dataclass
class Decoded:
    """A decoded picture.

    ``index[row, col]`` selects the pixel's packed colour: ``table[index]``
    when ``table`` is given (palette-like pictures, ``index`` uint8/uint16),
    else ``index`` holds the packed colour itself (uint32).
    """

    index: np.ndarray
    table: np.ndarray | None
    header: Header

    @property
    def shape(self) -> tuple[int, int]:
        return (int(self.index.shape[0]), int(self.index.shape[1]))

    def census(self) -> tuple[np.ndarray, np.ndarray]:
        """Distinct packed colours and their pixel counts, most common first
        (ties by colour value)."""
        if self.table is not None:
            per_entry = np.bincount(self.index.ravel(), minlength=len(self.table))[: len(self.table)]
            present = per_entry > 0
            colours, inverse = np.unique(self.table[present], return_inverse=True)
            counts = np.bincount(inverse, weights=per_entry[present], minlength=len(colours)).astype(np.int64)
        else:
            colours, counts = np.unique(self.index, return_counts=True)
        order = np.lexsort((colours, -counts))
        return colours[order].astype(np.uint32), counts[order].astype(np.int64)


def require_regular_file(path, label: str, what: str) -> None:
    """Refuse (CaseError) a path that exists but is not a regular file: a FIFO or a device would
    block a reader or never end, a folder is no file. A missing path is left to the reader's message."""
    import os
    import stat

    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        return
    except OSError as exc:
        raise CaseError(f"{label}: cannot read the {what} ({exc.strerror or exc})") from None
    if stat.S_ISDIR(mode):
        raise CaseError(f"{label}: is a folder, not a {what}")
    if not stat.S_ISREG(mode):
        kind = "FIFO (named pipe)" if stat.S_ISFIFO(mode) else "device" if (stat.S_ISCHR(mode) or stat.S_ISBLK(mode)) \
            else "socket" if stat.S_ISSOCK(mode) else "special file"
        raise CaseError(f"{label}: is a {kind}, not a regular file; a {what} must be a regular file")


def read_file(path, label: str, what: str, noun: str, limit: int | None = None) -> bytes:
    """The bytes of a regular file (the first ``limit`` of them if given), or a CaseError that
    names ``label``: "``noun`` not found", "is a folder, not a ``what``", "cannot read the ``noun``"."""
    require_regular_file(path, label, what)
    try:
        with open(path, "rb") as f:
            return f.read() if limit is None else f.read(limit)
    except FileNotFoundError:
        raise CaseError(f"{label}: {noun} not found") from None
    except IsADirectoryError:
        raise CaseError(f"{label}: is a folder, not a {what}") from None
    except OSError as exc:
        raise CaseError(f"{label}: cannot read the {noun} ({exc.strerror or exc})") from None


def read_header(path: Path, label: str | None = None) -> Header:
    """Read width, height, bit depth and colour type from the PNG's IHDR chunk."""
    label = label or str(path)
    head = read_file(path, label, "PNG picture", "picture", 33)
    if not head.startswith(PNG_SIGNATURE):
        raise CaseError(f"{label}: not a PNG picture (no PNG signature at the start of the file)")
    if len(head) < 33 or head[12:16] != b"IHDR":
        raise CaseError(f"{label}: broken PNG picture (no IHDR header chunk)")
    width, height, depth, ctype = struct.unpack(">IIBB", head[16:26])
    if width == 0 or height == 0:
        raise CaseError(f"{label}: broken PNG picture (size {width} x {height})")
    if (ctype, depth) not in {(0, 1), (0, 2), (0, 4), (0, 8), (0, 16), (2, 8), (2, 16), (3, 1), (3, 2), (3, 4), (3, 8), (4, 8), (4, 16), (6, 8), (6, 16)}:
        raise CaseError(f"{label}: broken PNG picture (bit depth {depth} with colour type {ctype} is not a PNG flavour)")
    return Header(int(width), int(height), int(depth), int(ctype))


def _guard(path: Path, header: Header, label: str) -> None:
    """Refuse a picture whose declared size its file cannot honestly hold, or whose decoding does not fit
    the available memory (instead of Pillow's default pixel limit)."""
    from relaxtui.solver import memory

    channels = {0: 1, 2: 3, 3: 1, 4: 2, 6: 4}[header.color_type]
    raw = header.height * (1 + (header.width * channels * header.bit_depth + 7) // 8)
    size = path.stat().st_size
    pixels = f"{header.width} x {header.height} pixels"
    if raw > DEFLATE_RATIO * size + (1 << 20):
        raise CaseError(f"{label}: picture refused by the decompression-bomb guard ({pixels} declared, more "
                        f"than its {size} bytes of compressed data can hold)")
    need = header.width * header.height * DECODE_BYTES[header.color_type] * (2 if header.bit_depth == 16 else 1)
    have = memory.available_bytes()
    if have is not None and need > have:
        raise CaseError(f"{label}: picture refused by the decompression-bomb guard (decoding {pixels} needs about "
                        f"{memory.format_bytes(need)}, more than the {memory.format_bytes(have)} of memory available)")


class _Limit:
    """While held: Pillow's default pixel limit lifted (this module's :func:`_guard` has run instead)."""

    def __enter__(self):
        from PIL import Image

        _LIMIT_LOCK.acquire()
        self.saved = Image.MAX_IMAGE_PIXELS
        if self.saved == PILLOW_DEFAULT_LIMIT:
            Image.MAX_IMAGE_PIXELS = None
        return self

    def __exit__(self, *exc):
        from PIL import Image

        if Image.MAX_IMAGE_PIXELS is None and self.saved == PILLOW_DEFAULT_LIMIT:
            Image.MAX_IMAGE_PIXELS = self.saved
        _LIMIT_LOCK.release()
        return False


def _rows(im) -> np.ndarray:
    """``np.asarray(im)`` of a one-band picture, copied out in row strips for a large one (no
    full-size bytes object on the way)."""
    w, h = im.size
    if w * h <= STRIP_PIXELS:
        return np.asarray(im)
    step = max(1, STRIP_PIXELS // w)
    out = None
    for r in range(0, h, step):
        part = np.asarray(im.crop((0, r, w, min(h, r + step))))
        if out is None:
            out = np.empty((h,) + part.shape[1:], part.dtype)
        out[r : r + part.shape[0]] = part
    return out


def _open(path: Path, label: str):
    """Image.open with the bomb guard's warning and error turned into CaseError."""
    from PIL import Image, UnidentifiedImageError

    require_regular_file(path, label, "PNG picture")  # a FIFO would block the reader forever

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            im = Image.open(path)
    except (Image.DecompressionBombWarning, Image.DecompressionBombError) as exc:
        raise CaseError(f"{label}: picture refused by the decompression-bomb guard ({exc})") from None
    except UnidentifiedImageError:
        raise CaseError(f"{label}: broken PNG picture (its chunks cannot be read)") from None
    except (OSError, ValueError, SyntaxError) as exc:
        raise CaseError(f"{label}: broken PNG picture ({exc})") from None
    if im.format != "PNG":
        im.close()
        raise CaseError(f"{label}: is a {im.format} picture, not a PNG")
    return im


def _load(im, label: str):
    from PIL import Image

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            im.load()
    except (Image.DecompressionBombWarning, Image.DecompressionBombError) as exc:
        raise CaseError(f"{label}: picture refused by the decompression-bomb guard ({exc})") from None
    except MemoryError:
        raise CaseError(f"{label}: not enough memory to decode the picture") from None
    except Exception as exc:  # Pillow reports broken data with many types
        raise CaseError(f"{label}: broken PNG picture ({exc or type(exc).__name__})") from None


def _grey_table(transparent_index: int | None = None, size: int = 256) -> np.ndarray:
    v = np.arange(256, dtype=np.uint32)
    table = np.zeros(size, np.uint32)
    table[:256] = v | v << 8 | v << 16
    if transparent_index is not None:
        table[transparent_index] = TRANSPARENT
    return table


def _low_bytes_rgb16(path: Path, label: str) -> np.ndarray:
    """Low bytes of a 16-bit RGB picture's samples (Pillow keeps the high ones)."""
    with _Limit():
        im = _open(path, label)
    try:
        tile = im.tile[0]
        args = tile.args
        if isinstance(args, tuple):
            args = ("RGB;16L",) + tuple(args[1:])
        else:
            args = "RGB;16L"
        # The same zip stream read with the little-endian unpacker yields the
        # second (low) byte of each big-endian sample.
        im.tile = [tile._replace(args=args)]
        with _Limit():
            _load(im, label)
        return np.asarray(im)
    finally:
        im.close()


def decode(path: str | Path, label: str | None = None) -> Decoded:
    """Decode a PNG picture of any flavour into a :class:`Decoded` picture.

    Raises :class:`CaseError` (naming ``label``, default the path) for a
    missing, broken or non-PNG file and for a picture the decompression-bomb
    guard refuses.
    """
    path = Path(path)
    label = label or str(path)
    header = read_header(path, label)
    with _Limit() as limit:
        if limit.saved == PILLOW_DEFAULT_LIMIT:
            _guard(path, header, label)
        im = _open(path, label)
        try:
            _load(im, label)
        except CaseError:
            im.close()
            raise
    try:
        mode = im.mode
        info_t = im.info.get("transparency")
        if mode == "1":
            index = _rows(im).astype(np.uint8)  # bool -> 0/1
            table = np.array([0, 0xFFFFFF], np.uint32)
            if info_t is not None:
                table[1 if info_t else 0] = TRANSPARENT
        elif mode == "L":
            index = _rows(im)
            t = None
            if isinstance(info_t, int):
                t = info_t
                if header.bit_depth < 8:  # key is in the file's depth, pixels are scaled
                    t = t * (255 // ((1 << header.bit_depth) - 1))
                t = t if 0 <= t <= 255 else None
            table = _grey_table(t)
        elif mode in ("I;16", "I;16B", "I;16L", "I"):
            raw = _rows(im)
            index = (raw >> 8).astype(np.uint16)
            if isinstance(info_t, int):
                index[raw == info_t] = 256
            table = _grey_table(size=257)
            table[256] = TRANSPARENT
        elif mode == "LA":
            a = np.asarray(im)
            index = a[:, :, 0].astype(np.uint16)
            index[a[:, :, 1] == 0] = 256
            table = _grey_table(size=257)
            table[256] = TRANSPARENT
        elif mode == "P":
            index = _rows(im)
            pal = im.getpalette("RGB") or []
            pal = np.array(pal[: 256 * 3], np.uint32)
            pal = np.concatenate([pal, np.zeros(256 * 3 - len(pal), np.uint32)]).reshape(256, 3)
            table = pal[:, 0] | pal[:, 1] << 8 | pal[:, 2] << 16
            if isinstance(info_t, (bytes, bytearray)):
                alpha = np.frombuffer(bytes(info_t[:256]), np.uint8)
                table[: len(alpha)][alpha == 0] = TRANSPARENT
            elif isinstance(info_t, int) and 0 <= info_t < 256:
                table[info_t] = TRANSPARENT
        elif mode in ("RGB", "RGBA"):
            rgba = np.asarray(im if mode == "RGBA" else im.convert("RGBA"))
            words = np.ascontiguousarray(rgba).view("<u4")[:, :, 0]
            table = None
            if mode == "RGBA":
                index = np.where(words < (1 << 24), TRANSPARENT, words & np.uint32(0xFFFFFF)).astype(np.uint32)
            else:
                index = words & np.uint32(0xFFFFFF)
                if isinstance(info_t, tuple) and len(info_t) == 3:
                    r, g, b = (int(x) for x in info_t)
                    if header.bit_depth == 16:
                        hit = index == pack_rgb(r >> 8, g >> 8, b >> 8)
                        if hit.any():
                            low = _low_bytes_rgb16(path, label)
                            hit &= (low[:, :, 0] == (r & 255)) & (low[:, :, 1] == (g & 255)) & (low[:, :, 2] == (b & 255))
                    else:
                        hit = index == pack_rgb(r, g, b)
                    index[hit] = TRANSPARENT
        else:  # not produced by Pillow's PNG reader today; convert and hope for the best
            rgba = np.asarray(im.convert("RGBA"))
            words = np.ascontiguousarray(rgba).view("<u4")[:, :, 0]
            index = np.where(words < (1 << 24), TRANSPARENT, words & np.uint32(0xFFFFFF)).astype(np.uint32)
            table = None
    finally:
        im.close()
    index = np.ascontiguousarray(index)
    if index.shape != (header.height, header.width):
        raise CaseError(f"{label}: broken PNG picture (decoded {index.shape[1]} x {index.shape[0]}, header says {header.width} x {header.height})")
    return Decoded(index=index, table=table, header=header)


def _pixel(flat_index: int, cols: int) -> str:
    r, c = divmod(int(flat_index), cols)
    return f"row {r}, column {c}"


def match(decoded: Decoded, declared: list[int], *, snap: bool = False, label: str = "picture", names: list[str] | None = None) -> tuple[np.ndarray, int]:
    """Turn a decoded picture into region codes.

    Parameters
    ----------
    decoded : Decoded
    declared : list of int
        Packed colour of each region, in declaration order (at most 255,
        no duplicates).
    snap : bool
        Give each unmatched opaque pixel the nearest declared opaque colour
        (Euclidean in RGB, ties to the region declared first).
    label : str
        The picture's name for error messages.

    Returns
    -------
    codes : (rows, cols) uint8
        Region index of each pixel.
    snapped : int
        Number of pixels that took a nearest colour.
    """
    if len(declared) > MAX_REGIONS:
        raise CaseError(f"{label}: {len(declared)} regions declared; at most {MAX_REGIONS} are supported")
    rows, cols = decoded.shape
    if decoded.table is not None:
        where = {int(c): i for i, c in reversed(list(enumerate(declared)))}
        lut = np.array([where.get(int(c), UNMATCHED) for c in decoded.table], np.uint8)
    else:
        lut = np.full((1 << 24) + 1, UNMATCHED, np.uint8)
        for i in range(len(declared) - 1, -1, -1):
            lut[int(declared[i])] = i
    # the look-up in row strips: no full-size temporary beside the codes
    codes = np.empty((rows, cols), np.uint8)
    step = max(1, STRIP_PIXELS // max(cols, 1))
    unmatched = False
    for r in range(0, rows, step):
        part = codes[r : r + step]
        np.take(lut, decoded.index[r : r + step], out=part)
        unmatched = unmatched or bool((part == UNMATCHED).any())
    if not unmatched:
        return codes, 0

    flat = codes.reshape(-1)
    positions = np.flatnonzero(flat == UNMATCHED)
    if decoded.table is not None:
        colours_at = decoded.table[decoded.index.reshape(-1)[positions]]
    else:
        colours_at = decoded.index.reshape(-1)[positions]
    colours, first, inverse, counts = np.unique(colours_at, return_index=True, return_inverse=True, return_counts=True)
    is_clear = colours == TRANSPARENT
    if is_clear.any():
        k = int(np.flatnonzero(is_clear)[0])
        raise CaseError(
            f"{label}: {int(counts[k])} transparent pixels (alpha 0) match no region, first at "
            f"{_pixel(positions[first[k]], cols)}; declare a region with color = \"transparent\""
            + (" (transparent pixels are never snapped)" if snap else "")
        )
    opaque_declared = [(i, int(c)) for i, c in enumerate(declared) if not int(c) & int(TRANSPARENT)]
    if not snap or not opaque_declared:
        # every unmatched colour, most pixels first (the contract lists each one); one pass
        # over the unique colours, whose counts and first pixels np.unique gave above
        order = np.lexsort((colours, -counts))
        parts = [f"{color_name(colours[j])} in {int(counts[j])} pixels (first at {_pixel(positions[first[j]], cols)})" for j in order]
        hint = "declare them in [[region]] tables or set snap = true" if not snap else "snap needs at least one declared colour other than \"transparent\""
        noun = "colour matches" if len(colours) == 1 else "colours match"
        raise CaseError(f"{label}: {len(colours)} {noun} no region ({hint}): " + "; ".join(parts))

    target_index = np.array([i for i, _ in opaque_declared], np.uint8)
    tc = np.array([c for _, c in opaque_declared], np.int64)
    trgb = np.stack([tc & 255, tc >> 8 & 255, tc >> 16 & 255], axis=1)  # (R, 3)
    nearest = np.empty(len(colours), np.uint8)
    cc = colours.astype(np.int64)
    for s in range(0, len(colours), _SNAP_CHUNK):
        part = cc[s : s + _SNAP_CHUNK]
        rgb = np.stack([part & 255, part >> 8 & 255, part >> 16 & 255], axis=1)  # (U, 3)
        d2 = ((rgb[:, None, :] - trgb[None, :, :]) ** 2).sum(axis=2)  # (U, R)
        nearest[s : s + _SNAP_CHUNK] = target_index[np.argmin(d2, axis=1)]  # first minimum: earliest region
    flat[positions] = nearest[inverse.reshape(-1)]
    return codes, int(len(positions))
