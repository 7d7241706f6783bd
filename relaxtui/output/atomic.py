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

from relaxtui.errors import OutputError, RelaxError, WriteRefused


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
    if os.path.lexists(target):
        import stat

        try:
            mode = os.stat(target).st_mode
        except OSError:
            mode = None  # a dangling symbolic link: the rename replaces the link itself
        if mode is not None and not stat.S_ISREG(mode):
            raise OutputError(f"cannot write {what} {str(target)!r}: it exists and is not a regular file "
                              "(a FIFO, device or socket is never replaced)")
    if not os.access(folder, os.W_OK):
        raise OutputError(f"cannot write {what} {str(target)!r}: folder {str(folder)!r} is not writable")
    return target


PAUSE_VARIABLE = "RELAXTUI_TEST_PAUSE_AT"


def pause_for_tests(stage: str) -> None:
    """Stop this process (SIGSTOP) at ``stage`` when the environment variable RELAXTUI_TEST_PAUSE_AT
    lists it (comma-separated). A hook for the signal tests (tests/test_signals.py): they kill or
    signal the stopped process at an exact moment of the writing, then continue it. Unset, it costs
    one dictionary lookup."""
    stages = os.environ.get(PAUSE_VARIABLE)
    if stages and stage in stages.split(","):
        import signal

        os.kill(os.getpid(), signal.SIGSTOP)


TEMP_TAG = "relaxtui-"  # temporary files are ".<name>.relaxtui-<pid>-<random>.part"


def _temp_prefix(name: str) -> str:
    return f".{name}.{TEMP_TAG}{os.getpid()}-"


def clean_stale_temps(path: str | os.PathLike) -> list[Path]:
    """Remove temporary files of our own naming for ``path`` left by a process that is gone.

    Only ``.<name>.relaxtui-<pid>-*.part`` files whose ``pid`` is not a running
    process are removed (a run killed while writing leaves them; a concurrent
    run's live ones stay). Returns the paths removed.
    """
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    removed = []
    head = f".{target.name}.{TEMP_TAG}"
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for entry in entries:
        name = entry.name
        if not (name.startswith(head) and name.endswith(".part")):
            continue
        pid_text = name[len(head):].split("-", 1)[0]
        if not pid_text.isdigit() or _alive(int(pid_text)):
            continue
        with contextlib.suppress(OSError):
            if entry.is_file(follow_symlinks=False):
                os.unlink(entry.path)
                removed.append(Path(entry.path))
    return removed


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # someone else's process
    except OSError:
        return False
    return True


class OutputSet:
    """Several outputs that appear together: every file is written to its temporary first,
    and only when all are complete are they renamed, in the order they were written.

    Use as ``with OutputSet(lock=folder) as batch:`` around the writers (every
    :func:`atomic_write` inside the block joins the batch), then
    ``batch.commit(first_remove=[...])``. An exception inside the block removes
    every temporary file and leaves the targets untouched. ``commit`` first
    removes the paths in ``first_remove`` (a previous report, so that no report
    ever sits beside a field it does not describe), then renames; it holds an
    exclusive advisory lock (flock) on the lock folder meanwhile, so two runs
    writing the same paths commit one whole set after the other.
    """

    _current = None

    def __init__(self, lock_folder: str | os.PathLike | None = None):
        self.pending: list[tuple[str, Path]] = []
        self.digests: dict[str, str] = {}  # temporary file -> SHA-256 of its bytes, where the writer computed it
        self.lock_folder = Path(lock_folder) if lock_folder is not None else None
        self._outer = None
        self.committed = False

    def __enter__(self):
        self._outer = OutputSet._current
        OutputSet._current = self
        return self

    def __exit__(self, kind, exc, tb):
        OutputSet._current = self._outer
        if kind is not None or not self.committed:
            self.discard()
        return False

    def discard(self) -> None:
        for tmp, _ in self.pending:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
        self.pending = []

    def commit(self, first_remove=()) -> list[Path]:
        lock = self._lock()
        try:
            pause_for_tests("remove")
            for p in first_remove:
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(p)
            done = []
            for i, (tmp, target) in enumerate(self.pending):
                pause_for_tests(f"rename:{i}")
                try:
                    os.replace(tmp, target)
                except OSError as exc:  # the temporaries not yet renamed are removed by discard()
                    raise WriteRefused(f"cannot write {str(target)!r}: {_os_reason(exc)}") from None
                done.append(target)
            pause_for_tests("renamed")
            _sync_folders({t.parent for _, t in self.pending})
            self.pending = []
            self.committed = True
            return done
        finally:
            if lock is not None:
                lock.close()

    def _lock(self):
        if self.lock_folder is None:
            return None
        import fcntl

        try:  # an advisory lock on the folder itself: nothing extra is written
            fd = os.open(self.lock_folder if str(self.lock_folder) else ".", os.O_RDONLY)
        except OSError:
            return None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX)
        except OSError:
            pass  # a file system without locks: the renames still happen
        return _Fd(fd)


class _Fd:
    """An open descriptor closed by ``close()`` (closing it releases the flock)."""

    def __init__(self, fd: int):
        self.fd = fd

    def close(self) -> None:
        if self.fd is not None:
            os.close(self.fd)
            self.fd = None


def _sync_folders(folders) -> None:
    for folder in folders:
        with contextlib.suppress(OSError):
            fd = os.open(folder if str(folder) else ".", os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)


@contextlib.contextmanager
def atomic_write(path: str | os.PathLike, mode: str = "wb", what: str = "output"):
    """Open a temporary file next to ``path``; rename it over ``path`` on success.

    Use as ``with atomic_write(p, "w") as f: f.write(...)``. On an exception
    (including KeyboardInterrupt) the temporary file is removed and ``path`` is
    left untouched. Inside an :class:`OutputSet` block the rename waits for the
    set's commit.
    """
    target = check_target(path, what)
    try:
        fd, tmp = tempfile.mkstemp(prefix=_temp_prefix(target.name), suffix=".part", dir=target.parent)
    except OSError as exc:  # a read-only or pseudo file system, a full disk, no permission: one line, no traceback
        folder = str(target.parent) if str(target.parent) else "."
        raise WriteRefused(f"cannot write {what} {str(target)!r}: {_os_reason(exc)} "
                          f"(creating a temporary file in folder {folder!r})") from None
    try:
        kwargs = {} if "b" in mode else {"encoding": "utf-8", "newline": ""}
        with os.fdopen(fd, mode, **kwargs) as handle:
            yield handle
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o644 & ~_umask())
        batch = OutputSet._current
        if batch is not None:
            batch.pending.append((tmp, target))
            digest = getattr(handle, "sha256", None)  # set by a writer that hashed the bytes it wrote
            if digest is not None:
                batch.digests[tmp] = digest
        else:
            os.replace(tmp, target)
    except OSError as exc:  # the disk filled up, a file size limit, an I/O error: the target is untouched
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        if isinstance(exc, RelaxError):
            raise
        raise WriteRefused(f"cannot write {what} {str(target)!r}: {_os_reason(exc)}; nothing was written") from None
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def _os_reason(exc: OSError) -> str:
    """The system's words for a failed file operation ("No space left on device"), without the path."""
    return exc.strerror or type(exc).__name__


def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 of a file's bytes (hex)."""
    import hashlib

    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


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


def json_safe(obj):
    """``obj`` with every non-finite float replaced by None (JSON has no NaN or infinity)."""
    import math

    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if hasattr(obj, "item") and hasattr(obj, "dtype") and getattr(obj, "ndim", 1) == 0:
        return json_safe(obj.item())  # a numpy scalar
    return obj


def write_json(path, obj, what: str = "report") -> Path:
    return write_text(path, json.dumps(json_safe(obj), indent=2, ensure_ascii=False, allow_nan=False) + "\n", what)


def write_npy(path, array, what: str = "field") -> Path:
    """Write one array as ``.npy`` (no pickling), atomically."""
    import numpy as np

    with atomic_write(path, "wb", what) as f:
        np.save(f, array, allow_pickle=False)
    return Path(path)


NPY_STRIP_BYTES = 4 << 20  # bytes per row strip of write_field_npy (three strip buffers are alive at once)


def write_field_npy(path, shape, fill_rows, what: str = "field", strip_bytes: int = NPY_STRIP_BYTES) -> str:
    """Write a (rows, cols) float64 array as ``.npy`` without holding it whole; returns the file's SHA-256.

    ``fill_rows(a, b, out)`` writes rows a .. b - 1 into ``out`` ((b - a, cols) float64). The file is
    the one :func:`numpy.save` writes for that array (the version 1.0 header, then the rows, C order),
    through :func:`atomic_write` (temporary file, then rename; inside an :class:`OutputSet` the rename
    waits for its commit and the set learns the digest). The SHA-256 is computed in a second thread as
    the strips are written (hashlib releases the GIL on large buffers), so stamping the report need not
    read the file again. An exception, KeyboardInterrupt included, at any strip leaves no file.
    """
    import hashlib
    import queue
    import threading

    import numpy as np
    from numpy.lib import format as npy_format

    rows, cols = (int(shape[0]), int(shape[1]))
    step = max(1, int(strip_bytes) // max(8 * cols, 1))
    header = io.BytesIO()
    npy_format.write_array_header_1_0(header, {"descr": npy_format.dtype_to_descr(np.dtype(np.float64)),
                                              "fortran_order": False, "shape": (rows, cols)})
    h = hashlib.sha256()
    # a strip is hashed while the next ones are filled and written: with a queue of one, the buffer
    # filled next is never the one being hashed (three buffers in turn)
    todo: queue.Queue = queue.Queue(maxsize=1)
    failed: list[BaseException] = []

    def hasher():
        while True:
            item = todo.get()
            if item is None:
                return
            try:
                h.update(item)
            except BaseException as exc:  # pragma: no cover - hashlib on a memoryview does not raise
                failed.append(exc)

    buffers = [np.empty((min(step, rows), cols)) for _ in range(3)] if rows else []
    thread = threading.Thread(target=hasher, name="relaxtui-sha256", daemon=True)
    thread.start()
    try:
        with atomic_write(path, "wb", what) as f:
            data = header.getvalue()
            f.write(data)
            todo.put(data)
            for k, a in enumerate(range(0, rows, step)):
                b = min(rows, a + step)
                out = buffers[k % 3][: b - a]
                fill_rows(a, b, out)
                view = memoryview(out).cast("B")
                f.write(view)
                todo.put(view)
            todo.put(None)
            thread.join()
            if failed:  # pragma: no cover
                raise failed[0]
            f.sha256 = h.hexdigest()
    finally:
        if thread.is_alive():
            todo.put(None)
            thread.join()
    return f.sha256


def write_npz(path, what: str = "bundle", **arrays) -> Path:
    """Write several arrays as an uncompressed ``.npz`` archive, atomically."""
    import numpy as np

    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return write_bytes(path, buffer.getvalue(), what)
