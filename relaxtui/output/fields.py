"""Field files: VTK ImageData, the .npz bundle, and reading a saved field back."""

from __future__ import annotations

import base64
import json
import zipfile
from pathlib import Path

import numpy as np

from relaxtui.case.model import Case
from relaxtui.errors import UsageError
from relaxtui.output.atomic import atomic_write, check_target
from relaxtui.output.flux import _check_field, flux

# --- VTK ImageData ----------------------------------------------------------------------------

# Bytes per base64 piece: a multiple of 3, so pieces encode without padding
# and concatenate into one valid base64 stream.
_B64_CHUNK = 3 * (1 << 20)


def write_vtk(path, field, case: Case) -> Path:
    """Write the field as VTK ImageData XML (``.vti``, VTK's XML file formats), atomically.

    The grid is the picture's cells: ``WholeExtent="0 cols 0 rows 0 0"``
    (point indices), ``Spacing`` = cell_size, ``Origin`` = (0, 0, 0) at the
    picture's bottom-left corner, so VTK's y points up and rows are written
    bottom-up (image row rows-1 first), x fastest. Cell data:

    * ``<quantity>`` (the case's quantity, e.g. "temperature"), Float64, NaN
      outside the domain — the active scalars;
    * ``region``, Int32: the region index of each cell (``case.regions``
      order; an XML comment in the file lists index, name and kind);
    * ``flux``, Float64 x 3: (qx, qy, 0) from :func:`flux` — the active vectors.

    Encoding: ``format="binary"`` (inline base64), little-endian,
    ``header_type="UInt64"``, uncompressed: each array is one base64 stream of
    an 8-byte byte count followed by the raw values. The file is streamed in
    pieces, so memory stays near the size of one array.
    """
    target = check_target(path, "VTK file")
    u = _check_field(field, case)
    rows, cols = case.shape
    qx, qy = flux(u, case)
    name = _xml_attr(case.quantity or "field")
    h = repr(float(case.cell_size))
    extent = f"0 {cols} 0 {rows} 0 0"
    comment = "; ".join(f"{i} = {r.name} ({r.kind})" for i, r in enumerate(case.regions)).replace("--", "- -")

    def flipped(a):
        return np.ascontiguousarray(a[::-1])

    arrays = [
        (name, "Float64", 1, lambda: flipped(u).astype("<f8", copy=False)),
        ("region", "Int32", 1, lambda: flipped(case.codes).astype("<i4")),
        ("flux", "Float64", 3, lambda: np.stack([flipped(qx), flipped(qy), np.zeros((rows, cols))], axis=-1).astype("<f8", copy=False)),
    ]
    arrays += _coefficient_arrays(case, flipped)
    with atomic_write(target, "wb", "VTK file") as f:
        f.write(b'<?xml version="1.0"?>\n')
        f.write(b'<VTKFile type="ImageData" version="1.0" byte_order="LittleEndian" header_type="UInt64">\n')
        f.write(f"  <!-- relaxtui: region index = name (kind): {_xml_text(comment)} -->\n".encode())
        f.write(f'  <ImageData WholeExtent="{extent}" Origin="0 0 0" Spacing="{h} {h} {h}">\n'.encode())
        f.write(f'    <Piece Extent="{extent}">\n'.encode())
        f.write(f'      <CellData Scalars="{name}" Vectors="flux">\n'.encode())
        for array_name, vtk_type, components, make in arrays:
            data = make()
            f.write(
                f'        <DataArray type="{vtk_type}" Name="{array_name}" NumberOfComponents="{components}" format="binary">\n          '.encode()
            )
            _write_base64(f, np.uint64(data.nbytes).astype("<u8").tobytes(), memoryview(data).cast("B"))
            f.write(b"\n        </DataArray>\n")
            del data
        f.write(b"      </CellData>\n    </Piece>\n  </ImageData>\n</VTKFile>\n")
    return target


def _coefficient_arrays(case: Case, flipped) -> list:
    """Case format v1.1: the per-cell conductivity (kx, ky) and source of a case with orthotropy or maps,
    NaN outside the interior cells (cell data beside the field)."""
    if not (getattr(case, "maps", ()) or any(getattr(r, "conductivity_y", None) is not None for r in case.regions)):
        return []
    from relaxtui.case.physics import cell_coefficients

    kx, ky, s = cell_coefficients(case)
    return [
        ("conductivity", "Float64", 2, lambda: np.stack([flipped(kx), flipped(ky)], axis=-1).astype("<f8", copy=False)),
        ("source", "Float64", 1, lambda: flipped(s).astype("<f8", copy=False)),
    ]


def _write_base64(f, head: bytes, body: memoryview) -> None:
    """Write base64(head + body) as one stream, in pieces."""
    first = len(head) + (-len(head)) % 3  # complete the head to a multiple of 3 from the body
    f.write(base64.b64encode(head + bytes(body[: first - len(head)])))
    pos = first - len(head)
    while pos < len(body):
        f.write(base64.b64encode(body[pos : pos + _B64_CHUNK]))
        pos += _B64_CHUNK


def _xml_attr(text: str) -> str:
    return text.replace("&", "&amp;").replace('"', "&quot;").replace("<", "&lt;").replace(">", "&gt;")


def _xml_text(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


# --- the bundle and the field loader ---------------------------------------------------------------

HISTORY_COLUMNS = ("sweep", "seconds", "residual", "estimated_error")


def write_bundle(path, *, field, case: Case, history, report, probes=None) -> Path:
    """Write one ``.npz`` archive of a run, atomically; return the path.

    Arrays (all loadable with ``numpy.load(path, allow_pickle=False)``):

    * ``field``: float64 (rows, cols), NaN outside the domain;
    * ``codes``: uint8 (rows, cols), the region index of each cell;
    * ``regions``: unicode (n,), the region names in index order;
    * ``history``: float64 (sweeps, k), one row per recorded sweep, columns
      named by ``history_columns`` — sweep, seconds, residual, estimated_error,
      and omega when the history records it;
    * ``history_columns``: unicode (k,);
    * ``report``: a 0-d unicode array holding the report as JSON text;
    * case format v1.1, only where the case has them: ``probe_names`` (unicode (p,)),
      ``probe_xy`` (float64 (p, 2), metres), ``probe_history`` (float64 (chunks, 2 + p):
      sweep, seconds, then each probe's value, from ``probes``, a
      :class:`relaxtui.output.probes.ProbeLog`); ``conductivity`` (float64 (rows, cols, 2),
      kx and ky per interior cell, NaN elsewhere) and ``source`` (float64 (rows, cols)) for a
      case with orthotropy or coefficient maps; ``geometry`` (0-d unicode) when not planar.

    ``history`` is an object with 1-D array attributes ``sweep``, ``seconds``,
    ``residual``, ``estimated_error`` (and optionally ``omega``), such as
    :class:`relaxtui.solver.driver.History`; ``report`` is a JSON-serialisable dict.
    """
    target = check_target(path, "bundle")
    u = _check_field(field, case)
    columns = list(HISTORY_COLUMNS)
    if history is not None and getattr(history, "omega", None) is not None:
        columns.append("omega")
    if history is None:
        table = np.empty((0, len(columns)))
    else:
        cols = [np.asarray(getattr(history, c), dtype=np.float64).ravel() for c in columns]
        lengths = {len(c) for c in cols}
        if len(lengths) != 1:
            raise UsageError(f"history columns differ in length: {dict(zip(columns, map(len, cols)))}")
        table = np.column_stack(cols) if cols[0].size else np.empty((0, len(columns)))
    text = json.dumps(report, indent=2, ensure_ascii=False, allow_nan=False)
    extra = {}
    if getattr(case, "probes", ()):
        extra["probe_names"] = np.array([p.name for p in case.probes], dtype=str)
        extra["probe_xy"] = np.array([[p.x, p.y] for p in case.probes], dtype=np.float64)
        if probes is not None and probes.rows:
            extra["probe_history"] = np.column_stack([np.asarray(probes.sweep, dtype=np.float64),
                                                      np.asarray(probes.seconds), np.array(probes.rows)])
        else:
            extra["probe_history"] = np.empty((0, 2 + len(case.probes)))
    if getattr(case, "maps", ()) or any(getattr(r, "conductivity_y", None) is not None for r in case.regions):
        from relaxtui.case.physics import cell_coefficients

        kx, ky, s = cell_coefficients(case)
        extra["conductivity"] = np.stack([kx, ky], axis=-1)
        extra["source"] = s
    if getattr(case, "geometry", "planar") != "planar":
        extra["geometry"] = np.array(case.geometry, dtype=str)
    with atomic_write(target, "wb", "bundle") as f:
        np.savez(
            f,
            field=np.ascontiguousarray(u, dtype=np.float64),
            codes=np.ascontiguousarray(case.codes, dtype=np.uint8),
            regions=np.array([r.name for r in case.regions], dtype=str),
            history=table,
            history_columns=np.array(columns, dtype=str),
            report=np.array(text, dtype=str),
            **extra,
        )
    return target


_NPY_MAGIC = b"\x93NUMPY"
_ZIP_MAGIC = b"PK\x03\x04"


def load_field(path, shape, what: str = "initial field") -> np.ndarray:
    """Load a field for ``--initial`` or ``render``: a ``.npy`` array or a bundle's ``field``.

    The file is recognised by its content (numpy's ``.npy`` magic, or a zip
    archive as written by :func:`write_bundle`), not its name. It must hold a
    floating-point array of the given shape: float64, or float32/float16,
    which convert to float64 exactly. Integer, boolean, complex and
    extended-precision arrays are refused (an integer array cannot hold NaN,
    the mark of a cell outside the domain), and so is anything that needs
    unpickling (object arrays). Every problem is a :class:`UsageError` with a
    one-line message naming the file. Returns a new C-contiguous float64 array.
    """
    label = f"{what} {str(path)!r}"
    p = Path(path)
    if not p.exists():
        raise UsageError(f"{label}: file does not exist")
    if p.is_dir():
        raise UsageError(f"{label}: is a folder, not a numpy file")
    try:
        with open(p, "rb") as f:
            magic = f.read(6)
            f.seek(0)
            if magic == _NPY_MAGIC:
                array = _read_npy(f, label, shape)
            elif magic[:4] == _ZIP_MAGIC:
                array = _read_bundle_field(f, label, shape)
            else:
                raise UsageError(f"{label}: not a numpy file (.npy array or .npz bundle)")
    except UsageError:
        raise
    except (OSError, ValueError, EOFError, zipfile.BadZipFile, KeyError) as exc:
        raise UsageError(f"{label}: cannot be read as numpy data ({_one_line(exc)})") from None
    return np.array(array, dtype=np.float64, order="C", copy=True)


def _check_header(label: str, dtype: np.dtype, got_shape, shape) -> None:
    if dtype.hasobject:
        raise UsageError(f"{label}: holds Python objects (pickled data), which are refused; save a float64 array")
    if dtype.kind != "f" or dtype.itemsize > 8:
        raise UsageError(f"{label}: has dtype {dtype}, a float64 (or float32) array is needed")
    if tuple(got_shape) != tuple(shape):
        raise UsageError(f"{label}: has shape {tuple(got_shape)}, the case's grid is {tuple(shape)}")


def _read_npy(f, label: str, shape) -> np.ndarray:
    from numpy.lib import format as npy

    version = npy.read_magic(f)
    if version == (1, 0):
        got_shape, fortran, dtype = npy.read_array_header_1_0(f)
    elif version == (2, 0):
        got_shape, fortran, dtype = npy.read_array_header_2_0(f)
    else:  # pragma: no cover - newer versions are read by read_array below
        got_shape, fortran, dtype = None, None, None
    if dtype is not None:
        _check_header(label, dtype, got_shape, shape)
    f.seek(0)
    array = npy.read_array(f, allow_pickle=False)
    _check_header(label, array.dtype, array.shape, shape)
    return array


def _read_bundle_field(f, label: str, shape) -> np.ndarray:
    with zipfile.ZipFile(f) as bundle:
        names = bundle.namelist()
        if "field.npy" not in names:
            arrays = ", ".join(n.removesuffix(".npy") for n in names) or "none"
            raise UsageError(f"{label}: archive has no 'field' array (arrays: {arrays})")
        with bundle.open("field.npy") as member:
            return _read_npy(member, label + " (its 'field')", shape)


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


