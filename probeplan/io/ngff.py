"""OME-Zarr (OME-NGFF) stacks: reading with channel names and pixel size, and writing atomically.

Read: an OME-Zarr image folder (NGFF 0.4, Zarr format 2, attributes at the group's top
level; or NGFF 0.5, Zarr format 3, attributes under ``"ome"``).  The first multiscale's first
dataset (full resolution) is read; its ``axes`` give the channel axis (``type: channel``) and
the spatial axes, its ``scale`` transformation and the axes' units the pixel size, and
``omero.channels[].label`` the channel names.  Write: NGFF 0.4 with Zarr format 2 (read by
most tools today): axes ``c[, z], y, x`` (and ``t`` first when present), one scale level, the
pixel size as the scale of y and x in micrometres, the channel names as ``omero`` labels.
The folder is written under a temporary name beside the target and renamed on success.

An image can also be read from an fsspec URL (``s3://bucket/a.ome.zarr``, ``file:///data/a.ome.zarr``,
``memory://a.ome.zarr``; zarr opens it through fsspec, and remote schemes need their fsspec
back-end installed, e.g. s3fs), so that cluster workers read their input where it lies.  Writing
stays local (a path the client and the workers share): object stores have no atomic rename.

Specification: OME-NGFF, https://ngff.openmicroscopy.org/0.4/ (Moore et al. 2021, Nat. Methods
18, 1496–1498, doi:10.1038/s41592-021-01326-w).
"""

from __future__ import annotations

import contextlib
import math
import os
import secrets
import shutil
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from probeplan.errors import input_error
from probeplan.io.stackinfo import RowReader

__all__ = ["is_url", "location_name", "is_ome_zarr", "inspect_ome_zarr", "ZarrStackReader", "ZarrStackWriter", "ZarrRowSink", "write_ome_zarr", "UNIT_UM"]

#: Spatial units of NGFF axes (UDUNITS-2 names) in µm.
UNIT_UM = {"micrometer": 1.0, "nanometer": 1e-3, "millimeter": 1e3, "centimeter": 1e4, "meter": 1e6,
           "angstrom": 1e-4}
_FIX = "give an OME-Zarr image folder (OME-NGFF 0.4 or 0.5) with 'multiscales' metadata"


_GROUP_FILES = (".zgroup", ".zattrs", "zarr.json")


def is_url(path) -> bool:
    """True for an fsspec URL (``scheme://...``) rather than a local path.

    Examples
    --------
    >>> is_url("s3://bucket/a.ome.zarr"), is_url("data/a.ome.zarr")
    (True, False)
    """
    return isinstance(path, str) and "://" in path


def location_name(path) -> str:
    """The last part of a path or URL, for messages.

    Examples
    --------
    >>> location_name("s3://bucket/m1/a.ome.zarr/"), location_name("data/b.tif")
    ('a.ome.zarr', 'b.tif')
    """
    if is_url(path):
        return path.rstrip("/").rsplit("/", 1)[-1]
    return Path(path).name


def is_ome_zarr(path) -> bool:
    """True for a folder (or an fsspec URL of one) that looks like a Zarr group (``.zattrs``/``.zgroup`` or
    ``zarr.json``)."""
    if is_url(path):
        import fsspec

        try:
            fs, root = fsspec.core.url_to_fs(path)
            return any(fs.isfile(f"{root.rstrip('/')}/{n}") for n in _GROUP_FILES)
        except (ImportError, ValueError, OSError):  # unknown scheme or back-end missing: not readable here
            return False
    p = Path(path)
    return p.is_dir() and any((p / n).is_file() for n in _GROUP_FILES)


def _open_group(path: Path, mode="r"):
    import zarr

    try:
        return zarr.open_group(str(path), mode=mode)
    except Exception as exc:  # zarr raises many kinds on damaged folders
        raise input_error(str(path), f"cannot be opened as a Zarr group ({type(exc).__name__}: {exc})", _FIX) from None


def inspect_ome_zarr(path, channel_axis: int | None = None):
    """The :class:`~probeplan.io.stacks.StackInfo` of an OME-Zarr image and its full-resolution array."""
    from probeplan.io.stackinfo import StackInfo

    path = path if is_url(path) else Path(path)
    where = str(path)
    group = _open_group(path)
    attrs = dict(group.attrs)
    attrs = attrs.get("ome", attrs)
    ms = attrs.get("multiscales")
    if not isinstance(ms, list) or not ms or not isinstance(ms[0], dict):
        raise input_error(where, "has no OME-NGFF 'multiscales' metadata", _FIX)
    ms0 = ms[0]
    try:
        dataset = ms0["datasets"][0]
        array = group[dataset["path"]]
        axes_meta = ms0.get("axes") or [{"name": a} for a in "tczyx"[-len(array.shape):]]
        names = [(a["name"] if isinstance(a, dict) else str(a)).lower() for a in axes_meta]
        types = [(a.get("type") if isinstance(a, dict) else None) for a in axes_meta]
        units = [(a.get("unit") if isinstance(a, dict) else None) for a in axes_meta]
    except (KeyError, IndexError, TypeError) as exc:
        raise input_error(where, f"its multiscales metadata are incomplete ({exc})", _FIX) from None
    shape = tuple(int(n) for n in array.shape)
    if len(names) != len(shape):
        raise input_error(where, f"{len(names)} axes for an array of {len(shape)} dimensions", _FIX)
    if "c" in names or "channel" in types:
        c_axis = types.index("channel") if "channel" in types else names.index("c")
        source = "file"
        if channel_axis is not None and channel_axis % len(shape) != c_axis:
            raise input_error("channel_axis", f"{channel_axis} contradicts {where}, whose axes put channels on axis "
                              f"{c_axis}", "give no channel_axis for files that name their axes")
    else:
        raise input_error(where, f"axes {names} have no channel axis", "give an image with a 'c' (channel) axis")
    if "y" not in names or "x" not in names:
        raise input_error(where, f"axes {names} lack y or x", _FIX)
    letters = "".join({"t": "T", "c": "C", "z": "Z", "y": "Y", "x": "X"}.get(n, "Q") for n in names)
    size = None
    for tr in dataset.get("coordinateTransformations", []) or []:
        if isinstance(tr, dict) and tr.get("type") == "scale":
            scale = tr.get("scale")
            iy, ix = names.index("y"), names.index("x")
            try:
                uy, ux = UNIT_UM.get(units[iy] or "micrometer"), UNIT_UM.get(units[ix] or "micrometer")
                if uy is not None and ux is not None:
                    size = (float(scale[iy]) * uy, float(scale[ix]) * ux)
                    if not all(math.isfinite(v) and v > 0 for v in size):
                        size = None
            except (TypeError, ValueError, IndexError):
                size = None
    labels = None
    omero = attrs.get("omero")
    if isinstance(omero, dict) and isinstance(omero.get("channels"), list):
        cand = [c.get("label") if isinstance(c, dict) else None for c in omero["channels"]]
        if len(cand) == shape[c_axis] and all(isinstance(c, str) and c for c in cand):
            labels = tuple(cand)
    info = StackInfo(path=path, shape=shape, dtype=np.dtype(array.dtype), axes=letters, channel_axis=c_axis,
                     channel_axis_source=source, row_axis=letters.index("Y"), channel_names=labels,
                     pixel_size_um=size)
    return info, array


class ZarrStackReader(RowReader):
    """Read an OME-Zarr image by blocks of rows (the protocol of :class:`probeplan.io.stackinfo.RowReader`)."""

    def __init__(self, info, array=None):
        self.info = info
        self._array = array

    def close(self) -> None:
        """Drop the open array (reopened when used again)."""
        self._array = None

    def read_rows(self, r0: int, r1: int) -> np.ndarray:
        """Rows ``r0:r1`` of the Y axis, all other axes whole, in the file's axis order."""
        self._check_rows(r0, r1)
        if self._array is None:
            _, self._array = inspect_ome_zarr(self.info.path)
        key = [slice(None)] * len(self.info.shape)
        key[self.info.row_axis] = slice(r0, r1)
        try:
            return np.asarray(self._array[tuple(key)])
        except Exception as exc:  # decoding errors of damaged chunks
            raise input_error(str(self.info.path), f"cannot decode rows {r0}:{r1} ({exc})", _FIX) from None


def _ngff_attrs(axes: str, channel_names, pixel_size_um) -> dict:
    kinds = {"T": ("t", "time"), "C": ("c", "channel"), "Z": ("z", "space"), "Y": ("y", "space"), "X": ("x", "space")}
    ax = []
    for a in axes:
        name, kind = kinds[a]
        entry = {"name": name, "type": kind}
        if a in "YX" and pixel_size_um is not None:
            entry["unit"] = "micrometer"
        ax.append(entry)
    scale = [1.0] * len(axes)
    if pixel_size_um is not None:
        scale[axes.index("Y")] = float(pixel_size_um[0])
        scale[axes.index("X")] = float(pixel_size_um[1])
    attrs = {"multiscales": [{"version": "0.4", "name": "probeplan", "axes": ax,
                              "datasets": [{"path": "0", "coordinateTransformations": [{"type": "scale",
                                                                                        "scale": scale}]}]}]}
    if channel_names is not None:
        attrs["omero"] = {"channels": [{"label": str(n), "active": True} for n in channel_names]}
    return attrs


@dataclass(frozen=True)
class ZarrRowSink:
    """Where rows of an OME-Zarr image being written go: the temporary folder, the row axis.

    Another process (a dask worker) opens the array by its absolute path and writes whole
    chunks of rows; writes from several workers are safe only when each covers whole chunks
    along Y (``row_chunk`` of the writer), which the caller arranges.
    """

    path: str
    row_axis: int

    def write_rows(self, r0: int, block: np.ndarray) -> None:
        """Open the array, write ``block`` at row ``r0``."""
        import zarr

        array = zarr.open_array(str(Path(self.path) / "0"), mode="r+")
        key = [slice(None)] * array.ndim
        key[self.row_axis] = slice(r0, r0 + block.shape[self.row_axis])
        array[tuple(key)] = np.asarray(block, dtype=array.dtype)


class ZarrStackWriter:
    """Write an OME-Zarr image block of rows by block (the interface of :class:`probeplan.io.stacks.StackWriter`).

    The folder is built under a temporary name beside the target; :meth:`commit` renames it
    onto the target (replacing an earlier result of the same name), :meth:`abort` removes it.
    """

    def __init__(self, path, shape, *, axes, channel_names=None, pixel_size_um=None, dtype=np.float32):
        import zarr

        self.path = Path(path)
        self.shape = tuple(int(n) for n in shape)
        self.axes = axes.upper()
        if len(self.axes) != len(self.shape) or not self.axes.endswith("YX") or "C" not in self.axes:
            raise input_error("axes", f"{axes!r} does not fit {len(self.shape)} dimensions", "give e.g. 'CYX'")
        folder = self.path.parent if str(self.path.parent) else Path(".")
        if not folder.is_dir():
            raise input_error(str(self.path), f"folder {str(folder)!r} does not exist", "create it first")
        self._tmp = folder / f".{self.path.name}.{secrets.token_hex(6)}.part"
        self.row_axis = self.axes.index("Y")
        try:
            group = zarr.open_group(str(self._tmp), mode="w", zarr_format=2)
            chunks = tuple(n if a not in "YX" else min(n, 512) for a, n in zip(self.axes, self.shape, strict=True))
            chunks = tuple(1 if a in "CTZ" else c for a, c in zip(self.axes, chunks, strict=True))
            self.row_chunk = chunks[self.row_axis]
            create = getattr(group, "create_array", None) or group.create_dataset
            self._array = create("0", shape=self.shape, chunks=chunks, dtype=np.dtype(dtype))
            group.attrs.update(_ngff_attrs(self.axes, channel_names, pixel_size_um))
        except BaseException:
            shutil.rmtree(self._tmp, ignore_errors=True)
            raise

    def write_rows(self, r0: int, block: np.ndarray) -> None:
        """Write ``block`` (the full shape except ``r1 - r0`` rows on the Y axis) at row ``r0``."""
        key = [slice(None)] * len(self.shape)
        key[self.row_axis] = slice(r0, r0 + block.shape[self.row_axis])
        self._array[tuple(key)] = np.asarray(block, dtype=self._array.dtype)

    def sink(self) -> ZarrRowSink:
        """A picklable handle with which another process writes rows into the temporary folder."""
        return ZarrRowSink(str(self._tmp.absolute()), self.row_axis)

    def commit(self) -> Path:
        """Rename the finished folder onto the target; return the target path."""
        old = None
        if self.path.exists():
            old = self.path.with_name(f".{self.path.name}.{secrets.token_hex(6)}.old")
            os.replace(self.path, old)
        os.replace(self._tmp, self.path)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        return self.path

    def abort(self) -> None:
        """Remove the temporary folder; the target is left untouched."""
        shutil.rmtree(self._tmp, ignore_errors=True)

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.commit()
        else:
            self.abort()


def write_ome_zarr(path, data, *, axes: str | None = None, channel_names: Sequence[str] | None = None,
                   pixel_size_um: tuple[float, float] | None = None, dtype=np.float32) -> Path:
    """Write a whole stack as an OME-Zarr image (NGFF 0.4) atomically.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "a.ome.zarr"
    >>> _ = write_ome_zarr(p, np.ones((2, 3, 4)), channel_names=["a", "b"], pixel_size_um=(0.5, 0.5))
    >>> info, _ = inspect_ome_zarr(p)
    >>> info.axes, info.channel_names, info.pixel_size_um
    ('CYX', ('a', 'b'), (0.5, 0.5))
    """
    data = np.asarray(data)
    axes = axes or {3: "CYX", 4: "CZYX"}.get(data.ndim, "")
    with contextlib.ExitStack() as stack:
        w = ZarrStackWriter(path, data.shape, axes=axes, channel_names=channel_names, pixel_size_um=pixel_size_um,
                            dtype=dtype)
        stack.enter_context(w)
        w.write_rows(0, data)
    return Path(path)
