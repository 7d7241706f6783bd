"""Atomic output: a file appears whole or not at all.

Every file relaxtui writes goes through :func:`atomic_write` (or a helper built
on it): the data go to a temporary file in the target folder, are flushed to
disk, and the temporary file is renamed over the target. A crash, Ctrl-C or a
full disk leaves the previous file (or none), never a half-written one.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import tempfile
from pathlib import Path

from relaxtui.errors import OutputError


def check_target(path: str | os.PathLike, what: str = "output") -> Path:
    """Refuse an output path whose folder does not exist or is not writable.

    Called before any work starts, so a long solve never ends in a write error.
    Returns the path as a :class:`Path`.
    """
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    if not folder.is_dir():
        raise OutputError(f"cannot write {what} {str(target)!r}: folder {str(folder)!r} does not exist")
    if target.is_dir():
        raise OutputError(f"cannot write {what} {str(target)!r}: it is a folder")
    if not os.access(folder, os.W_OK):
        raise OutputError(f"cannot write {what} {str(target)!r}: folder {str(folder)!r} is not writable")
    return target


@contextlib.contextmanager
def atomic_write(path: str | os.PathLike, mode: str = "wb", what: str = "output"):
    """Open a temporary file next to ``path``; rename it over ``path`` on success.

    Use as ``with atomic_write(p, "w") as f: f.write(...)``. On an exception
    (including KeyboardInterrupt) the temporary file is removed and ``path`` is
    left untouched.
    """
    target = check_target(path, what)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    try:
        kwargs = {} if "b" in mode else {"encoding": "utf-8", "newline": ""}
        with os.fdopen(fd, mode, **kwargs) as handle:
            yield handle
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o644 & ~_umask())
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def write_bytes(path, data: bytes, what: str = "output") -> Path:
    with atomic_write(path, "wb", what) as f:
        f.write(data)
    return Path(path)


def write_text(path, text: str, what: str = "output") -> Path:
    with atomic_write(path, "w", what) as f:
        f.write(text)
    return Path(path)


def write_json(path, obj, what: str = "report") -> Path:
    return write_text(path, json.dumps(obj, indent=2, ensure_ascii=False, allow_nan=False) + "\n", what)


def write_npy(path, array, what: str = "field") -> Path:
    """Write one array as ``.npy`` (no pickling), atomically."""
    import numpy as np

    with atomic_write(path, "wb", what) as f:
        np.save(f, array, allow_pickle=False)
    return Path(path)


def write_npz(path, what: str = "bundle", **arrays) -> Path:
    """Write several arrays as an uncompressed ``.npz`` archive, atomically."""
    import numpy as np

    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return write_bytes(path, buffer.getvalue(), what)
