"""TIFF / OME-TIFF image stacks: reading (whole or by rows) and writing abundance stacks.

Stacks are read with their axes: ``(C, Y, X)``, ``(C, Z, Y, X)``, ``(T, C, Y, X)`` and
other orders tifffile reports.  The channel axis comes from the file when it says
(OME-TIFF ``C`` axis, or RGB samples ``S``); a plain 3-D TIFF is taken as channel-first
(the package convention) and the choice is recorded in
:attr:`StackInfo.channel_axis_source`; a plain stack of more dimensions needs an explicit
``channel_axis``.  Channel names and the physical pixel size come from the OME metadata
when present.

Reading by rows never holds the whole stack in memory: uncompressed contiguous files
are read with positioned reads at the byte offsets tifffile reports; other files
(compressed, tiled) go through tifffile's zarr store (``imread(path, aszarr=True)`` and
``zarr.open``).  Writing goes to a temporary file that is renamed on success
(:func:`probeplan.io.atomic.atomic_path`), so no half-written file is left under the
final name.
"""

from __future__ import annotations

import contextlib
import math
import os
import xml.etree.ElementTree as ET
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from probeplan.errors import InputError, input_error
from probeplan.io.atomic import atomic_path, write_error
from probeplan.io.stackinfo import RowReader, StackInfo

__all__ = [
    "StackInfo",
    "StackReader",
    "StackWriter",
    "RowSink",
    "open_stack",
    "read_stack",
    "write_stack",
    "UM_PER_UNIT",
]

#: Length units accepted in OME ``PhysicalSize*Unit`` and their size in µm.
UM_PER_UNIT = {"µm": 1.0, "um": 1.0, "micron": 1.0, "nm": 1e-3, "mm": 1e3, "cm": 1e4, "m": 1e6, "Å": 1e-4}

_FIX_TIFF = "check the file is a complete TIFF or OME-TIFF stack (re-export it from the acquisition software)"


def _ome_details(ome_xml: str) -> tuple[tuple[str, ...] | None, tuple[float, float] | None]:
    try:
        root = ET.fromstring(ome_xml)
    except ET.ParseError:
        return None, None
    pixels = next((el for el in root.iter() if el.tag.endswith("}Pixels") or el.tag == "Pixels"), None)
    if pixels is None:
        return None, None
    names = [ch.get("Name") for ch in pixels if ch.tag.endswith("Channel")]
    channel_names = tuple(names) if names and all(names) else None
    size = None
    try:
        sx, sy = pixels.get("PhysicalSizeX"), pixels.get("PhysicalSizeY")
        if sx is not None and sy is not None:
            ux = UM_PER_UNIT[pixels.get("PhysicalSizeXUnit", "µm")]
            uy = UM_PER_UNIT[pixels.get("PhysicalSizeYUnit", "µm")]
            size = (float(sy) * uy, float(sx) * ux)
            if not all(math.isfinite(v) and v > 0 for v in size):
                size = None  # NaN, inf, zero or negative: unknown, as for an unreadable value
    except (KeyError, ValueError, TypeError):
        size = None
    return channel_names, size


def _ifd_chain_broken(tif, file_size: int) -> bool:
    """True when the last page read points on to a next IFD outside the file (or back into the chain).

    tifffile stops quietly (with a log message) at such a pointer, which a file cut short
    leaves behind; the pages before it would otherwise pass for the whole stack.
    """
    import struct

    fmt = tif.tiff
    if fmt.is_ndpi or not len(tif.pages):
        return False
    n_pages = len(tif.pages)  # indexes the whole chain
    offsets = {int(p.offset) for p in tif.pages if p is not None}
    last = int(tif.pages[n_pages - 1].offset)
    fh = tif.filehandle
    fh.seek(last)
    raw = fh.read(fmt.tagnosize)
    if len(raw) != fmt.tagnosize:
        return True
    n_tags = struct.unpack(fmt.tagnoformat, raw)[0]
    fh.seek(last + fmt.tagnosize + n_tags * fmt.tagsize)
    raw = fh.read(fmt.offsetsize)
    if len(raw) != fmt.offsetsize:
        return True
    following = struct.unpack(fmt.offsetformat, raw)[0]
    return following != 0 and (following >= file_size or following in offsets)


def _imagej_details(tif, n_planes_c: int | None) -> tuple[tuple[str, ...] | None, tuple[float, float] | None]:
    """Channel labels and pixel calibration of an ImageJ hyperstack (``Labels``, X/YResolution, ``unit``)."""
    meta = tif.imagej_metadata or {}
    names = None
    labels = meta.get("Labels")
    if isinstance(labels, (list, tuple)) and n_planes_c and len(labels) >= n_planes_c:
        # ImageJ keeps one label per plane; in a hyperstack without Z/T the planes are the channels.
        cand = tuple(str(x) for x in labels[:n_planes_c])
        if all(cand) and len(labels) == n_planes_c:
            names = cand
    size = None
    unit = str(meta.get("unit", "")).replace("\\u00B5", "µ").strip()
    page = tif.pages[0]
    try:
        xr = page.tags["XResolution"].value
        yr = page.tags["YResolution"].value
        px_per_unit_x = xr[0] / xr[1]
        px_per_unit_y = yr[0] / yr[1]
        if unit in UM_PER_UNIT and px_per_unit_x > 0 and px_per_unit_y > 0:
            size = (UM_PER_UNIT[unit] / px_per_unit_y, UM_PER_UNIT[unit] / px_per_unit_x)
            if not all(math.isfinite(v) and v > 0 for v in size):
                size = None
    except (KeyError, ZeroDivisionError, TypeError, IndexError, AttributeError):
        size = None
    return names, size


def _inspect(path: Path, channel_axis: int | None, *, allow_plane: bool = False) -> StackInfo:
    import tifffile

    where = str(path)
    if not path.is_file():
        raise input_error(where, "file not found", "give the path of an existing TIFF stack")
    file_size = path.stat().st_size
    if file_size == 0:
        raise input_error(where, "the file is empty (0 bytes)", _FIX_TIFF)
    try:
        with tifffile.TiffFile(path) as tif:
            if not tif.series or not tif.pages:
                raise input_error(where, "the TIFF holds no image", _FIX_TIFF)
            series = tif.series[0]
            shape = tuple(int(n) for n in series.shape)
            axes = series.axes.upper()
            file_dtype = np.dtype(series.dtype).newbyteorder(tif.byteorder)
            offset = series.dataoffset
            missing = sum(page is None for page in series.pages)
            if missing:  # tifffile would fill them with zeros
                raise input_error(where, f"the metadata describe {len(series.pages)} image planes but {missing} are "
                                  "not in the file", _FIX_TIFF)
            for page in series.pages:
                for off, count in zip(page.dataoffsets, page.databytecounts, strict=False):
                    if off + count > file_size:
                        raise input_error(
                            where, f"truncated: image data ends at byte {off + count} but the file has {file_size}",
                            _FIX_TIFF,
                        )
            if _ifd_chain_broken(tif, file_size):
                raise input_error(where, "truncated or damaged: the chain of image pages breaks off", _FIX_TIFF)
            names, pixel_size = _ome_details(tif.ome_metadata) if tif.is_ome and tif.ome_metadata else (None, None)
            if not tif.is_ome and tif.is_imagej:
                n_c = shape[axes.index("C")] if "C" in axes else None
                names, pixel_size = _imagej_details(tif, n_c)
    except InputError:
        raise
    except Exception as exc:  # tifffile raises many kinds (struct.error, RuntimeError, ...) on damaged files
        raise input_error(where, f"cannot be read as TIFF ({type(exc).__name__}: {exc})", _FIX_TIFF) from None
    if len(shape) == 2 and allow_plane:  # one channel per file: a plane read as a stack of one channel
        shape, axes = (1, *shape), "C" + axes
    if len(shape) < 3:
        raise input_error(where, f"shape {shape} has no channel axis",
                          "give a stack of several channels (C, Y, X), or list one file per channel in a study table")
    if offset is not None and offset + math.prod(shape) * file_dtype.itemsize > file_size:
        raise input_error(where, "truncated: image data runs past the end of the file", _FIX_TIFF)
    ndim = len(shape)
    if channel_axis is not None:
        if not -ndim <= channel_axis < ndim:
            raise input_error("channel_axis", f"{channel_axis} is out of range for {ndim} axes {axes!r}",
                              f"give an axis between 0 and {ndim - 1}")
        channel_axis %= ndim
    file_axis = axes.index("C") if "C" in axes else (axes.index("S") if "S" in axes else None)
    if file_axis is not None:
        if channel_axis is not None and channel_axis != file_axis:
            raise input_error(
                "channel_axis", f"{channel_axis} contradicts {where}, whose axes {axes!r} put channels on axis {file_axis}",
                "give no channel_axis for files that name their axes",
            )
        c_axis, source = file_axis, "file"
    elif channel_axis is not None:
        c_axis, source = channel_axis, "argument"
    elif ndim == 3:
        c_axis, source = 0, "channel-first convention"
    else:
        raise input_error(
            where, f"axes {axes!r} do not say which axis holds the channels", "give channel_axis=N"
        )
    if source == "argument":
        # The file does not name its axes (tifffile reports e.g. 'QYX' for any 3-D array): the two
        # last axes other than the channel axis are the image rows and columns.
        rest = [i for i in range(ndim) if i != c_axis]
        letters = ["Q"] * ndim
        letters[c_axis] = "C"
        letters[rest[-2]], letters[rest[-1]] = "Y", "X"
        axes = "".join(letters)
    row_axis = axes.index("Y") if "Y" in axes else ndim - 2
    if row_axis == c_axis:
        raise input_error("channel_axis", f"axis {c_axis} is the row (Y) axis of {where}", "choose the channel axis")
    if names is not None and len(names) != shape[c_axis]:
        names = None
    return StackInfo(
        path=path, shape=shape, dtype=file_dtype.newbyteorder("="), axes=axes, channel_axis=c_axis,
        channel_axis_source=source, row_axis=row_axis, channel_names=names, pixel_size_um=pixel_size,
        data_offset=offset, file_dtype=file_dtype,
    )


class StackReader(RowReader):
    """Read a stack by blocks of rows without loading the whole file.

    Use :func:`open_stack` to make one; it is a context manager.  It can be pickled
    (it holds only the path and metadata; the file is reopened where it is used).
    """

    def __init__(self, info: StackInfo):
        self.info = info
        self._fd: int | None = None
        self._zarr = None
        self._store = None

    def close(self) -> None:
        """Release the open file handles."""
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        if self._store is not None:
            with contextlib.suppress(Exception):
                self._store.close()
            self._store = None
            self._zarr = None

    def _read_contiguous(self, r0: int, r1: int) -> np.ndarray:
        info = self.info
        if self._fd is None:
            self._fd = os.open(info.path, os.O_RDONLY)
        shape = list(info.shape)
        ra = info.row_axis
        inner = math.prod(shape[ra + 1 :])
        outer_shape = shape[:ra]
        block_shape = [*outer_shape, r1 - r0, *shape[ra + 1 :]]
        out = np.empty(block_shape, dtype=info.file_dtype)
        flat = out.reshape(math.prod(outer_shape) if outer_shape else 1, -1)
        item = info.file_dtype.itemsize
        run_bytes = (r1 - r0) * inner * item
        for j, idx in enumerate(np.ndindex(*outer_shape) if outer_shape else [()]):
            start = 0
            for a, i in enumerate(idx):
                start = start * shape[a] + i
            start = (start * shape[ra] + r0) * inner * item
            view = memoryview(flat[j]).cast("B")
            got = os.preadv(self._fd, [view], info.data_offset + start)
            if got != run_bytes:
                raise input_error(str(info.path), f"truncated: short read at byte {info.data_offset + start}", _FIX_TIFF)
        return out

    def _read_zarr(self, r0: int, r1: int) -> np.ndarray:
        import tifffile
        import zarr

        if self._zarr is None:
            self._store = tifffile.imread(self.info.path, aszarr=True)
            z = zarr.open(self._store, mode="r")
            if not hasattr(z, "shape"):  # a multiscale group: level 0 is full resolution
                z = z["0"]
            self._zarr = z
        key = [slice(None)] * len(self.info.shape)
        key[self.info.row_axis] = slice(r0, r1)
        plane = len(self._zarr.shape) == len(self.info.shape) - 1  # a single plane read as one channel
        try:
            if plane:
                return np.asarray(self._zarr[tuple(key[1:])])[None]
            return np.asarray(self._zarr[tuple(key)])
        except Exception as exc:  # decoding errors of damaged files
            raise input_error(str(self.info.path), f"cannot decode rows {r0}:{r1} ({exc})", _FIX_TIFF) from None

    def read_rows(self, r0: int, r1: int) -> np.ndarray:
        """Rows ``r0:r1`` of the row (Y) axis, all other axes whole, in the file's axis order."""
        self._check_rows(r0, r1)
        if self.info.data_offset is not None:
            block = self._read_contiguous(r0, r1)
        else:
            block = self._read_zarr(r0, r1)
        if block.dtype.byteorder not in ("=", "|"):
            block = block.astype(block.dtype.newbyteorder("="))
        return block


def open_stack(path: str | os.PathLike, *, channel_axis: int | None = None, allow_plane: bool = False) -> StackReader:
    """Open a TIFF/OME-TIFF stack, or an OME-Zarr image folder (:mod:`probeplan.io.ngff`), for reading by rows.

    Parameters
    ----------
    path : path-like, or an fsspec URL of an OME-Zarr image (``s3://...``, ``file://...``)
    channel_axis : int, optional
        Needed only when the file does not name its axes and has more than 3 dimensions,
        or to read a plain 3-D file whose channels are last (``channel_axis=2``).
    allow_plane : bool
        Read a 2-D image as a stack of one channel (a file per channel).

    Returns
    -------
    StackReader

    Raises
    ------
    InputError
        Missing, empty, truncated or unreadable file; channel axis unknown or contradicting
        the file.

    Examples
    --------
    >>> import tempfile, pathlib, numpy as np, tifffile
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "s.tif"
    >>> tifffile.imwrite(p, np.zeros((3, 4, 5), np.uint16), photometric="minisblack")
    >>> with open_stack(p) as r:
    ...     r.info.n_channels, r.info.channel_axis_source, r.read_rows(1, 3).shape
    (3, 'channel-first convention', (3, 2, 5))
    """
    from probeplan.io.ngff import ZarrStackReader, inspect_ome_zarr, is_ome_zarr, is_url

    if is_ome_zarr(path):
        return ZarrStackReader(*inspect_ome_zarr(path, channel_axis))
    if is_url(path):
        raise input_error(path, "is not an OME-Zarr image that can be opened at that URL",
                          "give the URL of an OME-Zarr image folder (with its fsspec back-end installed, e.g. s3fs "
                          "for s3://), or copy a TIFF to a local or shared path")
    return StackReader(_inspect(Path(path), channel_axis, allow_plane=allow_plane))


def read_stack(path: str | os.PathLike, *, channel_axis: int | None = None) -> tuple[np.ndarray, StackInfo]:
    """Read a whole stack; returns ``(array in the file's axis order, StackInfo)``.

    Examples
    --------
    >>> import tempfile, pathlib, numpy as np
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "a.tif"
    >>> _ = write_stack(p, np.ones((2, 3, 4)), channel_names=["a", "b"], pixel_size_um=(0.5, 0.5))
    >>> data, info = read_stack(p)
    >>> data.dtype.name, info.axes, info.channel_names, info.pixel_size_um
    ('float32', 'CYX', ('a', 'b'), (0.5, 0.5))
    """
    with open_stack(path, channel_axis=channel_axis) as reader:
        return reader.read(), reader.info


def _ome_metadata(axes: str, channel_names: Sequence[str] | None, pixel_size_um) -> dict:
    meta: dict = {"axes": axes}
    if channel_names is not None:
        meta["Channel"] = {"Name": [str(n) for n in channel_names]}
    if pixel_size_um is not None:
        meta.update(
            PhysicalSizeY=float(pixel_size_um[0]), PhysicalSizeYUnit="µm",
            PhysicalSizeX=float(pixel_size_um[1]), PhysicalSizeXUnit="µm",
        )
    return meta


def _check_axes(axes: str, ndim: int) -> str:
    axes = axes.upper()
    if len(axes) != ndim or "C" not in axes or not axes.endswith("YX"):
        raise input_error("axes", f"{axes!r} does not fit {ndim} dimensions", "give e.g. 'CYX', 'CZYX' or 'TCYX'")
    return axes


def write_stack(
    path: str | os.PathLike,
    data: np.ndarray,
    *,
    axes: str | None = None,
    channel_names: Sequence[str] | None = None,
    pixel_size_um: tuple[float, float] | None = None,
    dtype=np.float32,
) -> Path:
    """Write a stack as OME-TIFF (float32 by default) atomically; a path ending ``.zarr`` writes OME-Zarr.

    Parameters
    ----------
    path : path-like
    data : ndarray, shape (K, Y, X), (K, Z, Y, X) or per ``axes``
    axes : str, optional
        Default ``"CYX"`` / ``"CZYX"`` by dimension.
    channel_names : sequence of str, optional
        Names of the components (stored as OME channel names).
    pixel_size_um : (float, float), optional
        Physical pixel size (y, x) in µm, carried over from the input.
    dtype : dtype
        Sample type written.
    """
    data = np.asarray(data)
    if axes is None:
        axes = {3: "CYX", 4: "CZYX"}.get(data.ndim, "")
    axes = _check_axes(axes, data.ndim)
    if str(path).lower().rstrip("/").endswith(".zarr"):
        from probeplan.io.ngff import write_ome_zarr

        return write_ome_zarr(path, data, axes=axes, channel_names=channel_names, pixel_size_um=pixel_size_um,
                              dtype=dtype)
    import tifffile

    with atomic_path(path) as tmp:
        tifffile.imwrite(
            tmp, data.astype(dtype, copy=False), ome=True, photometric="minisblack",
            metadata=_ome_metadata(axes, channel_names, pixel_size_um),
        )
    return Path(path)


def _pwrite_rows(fd, offset, shape, row_axis, dtype, r0, block, *, where) -> None:
    block = np.ascontiguousarray(block, dtype=np.dtype(dtype).newbyteorder("<"))
    ra = row_axis
    nrows = block.shape[ra]
    if nrows and r0 + nrows > shape[ra]:
        raise input_error("rows", f"{r0}:{r0 + nrows} outside 0:{shape[ra]}", "write rows inside the image")
    inner = math.prod(shape[ra + 1 :])
    outer = shape[:ra]
    flat = block.reshape(math.prod(outer) if outer else 1, -1)
    item = block.dtype.itemsize
    for j, idx in enumerate(np.ndindex(*outer) if outer else [()]):
        start = 0
        for a, i in enumerate(idx):
            start = start * shape[a] + i
        start = (start * shape[ra] + r0) * inner * item
        try:
            os.pwrite(fd, memoryview(flat[j]).cast("B"), offset + start)
        except OSError as exc:  # a full disk, a vanished folder: one line naming the output
            raise write_error(where, exc) from None


@dataclass(frozen=True)
class RowSink:
    """Where rows of a stack being written go: a file path, its pixel-data offset, shape, row axis, dtype."""

    path: str
    offset: int
    shape: tuple[int, ...]
    row_axis: int
    dtype: str

    def write_rows(self, r0: int, block: np.ndarray) -> None:
        """Open the file, write ``block`` at row ``r0``, close it."""
        try:
            fd = os.open(self.path, os.O_WRONLY)
        except OSError as exc:
            raise write_error(self.path, exc) from None
        try:
            _pwrite_rows(fd, self.offset, self.shape, self.row_axis, self.dtype, r0, block, where=self.path)
        finally:
            os.close(fd)


class StackWriter:
    """Write an OME-TIFF stack block of rows by block, with bounded memory.

    The file is created (uncompressed, contiguous) under a temporary name; blocks are
    written at their byte offsets; :meth:`commit` renames it onto the target.  Used as a
    context manager it commits on success and removes the temporary file on any error.
    """

    def __init__(self, path, shape, *, axes, channel_names=None, pixel_size_um=None, dtype=np.float32):
        import tifffile

        self.path = Path(path)
        self.shape = tuple(int(n) for n in shape)
        self.axes = _check_axes(axes, len(self.shape))
        self.dtype = np.dtype(dtype)
        self.row_axis = self.axes.index("Y")
        self._fd = None
        self._ctx = atomic_path(self.path)
        self._tmp = self._ctx.__enter__()
        try:
            offset, _ = tifffile.imwrite(
                self._tmp, shape=self.shape, dtype=self.dtype, photometric="minisblack", ome=True,
                metadata=_ome_metadata(self.axes, channel_names, pixel_size_um), returnoffset=True,
            )
            self._offset = int(offset)
            self._fd = os.open(self._tmp, os.O_RDWR)
        except BaseException as exc:
            self._ctx.__exit__(type(exc), exc, exc.__traceback__)
            raise

    def write_rows(self, r0: int, block: np.ndarray) -> None:
        """Write ``block`` (the full shape except ``r1 - r0`` rows on the Y axis) at row ``r0``."""
        _pwrite_rows(self._fd, self._offset, self.shape, self.row_axis, self.dtype, r0, block, where=self.path)

    def sink(self) -> RowSink:
        """A picklable handle with which another process writes rows into the temporary file.

        For distributed runs: the worker opens the file by its absolute path (a filesystem it
        shares with this process) and writes its rows at their offsets; :meth:`commit` here
        still renames the finished file onto the target.
        """
        return RowSink(str(Path(self._tmp).absolute()), self._offset, self.shape, self.row_axis, self.dtype.str)

    def commit(self) -> Path:
        """Flush, close and rename onto the target; return the target path."""
        try:
            os.fsync(self._fd)
        except OSError as exc:
            raise write_error(self.path, exc) from None
        os.close(self._fd)
        self._fd = None
        self._ctx.__exit__(None, None, None)
        return self.path

    def abort(self) -> None:
        """Remove the temporary file; the target is left untouched."""
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        err = RuntimeError("aborted")
        with contextlib.suppress(RuntimeError):
            self._ctx.__exit__(RuntimeError, err, None)

    def __enter__(self) -> StackWriter:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.commit()
        else:
            self.abort()
