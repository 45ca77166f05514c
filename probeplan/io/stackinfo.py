"""What is known about an image stack file (:class:`StackInfo`) and the row-reading protocol (:class:`RowReader`),
shared by the TIFF and OME-Zarr readers."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from probeplan.errors import input_error

__all__ = ["StackInfo", "RowReader"]


@dataclass(frozen=True)
class StackInfo:
    """What is known about a stack file.

    Attributes
    ----------
    path : Path
    shape : tuple of int
        Shape in the file's axis order.
    dtype : numpy.dtype
        Native-byte-order dtype of the samples.
    axes : str
        One letter per axis (tifffile's codes: C channel, Z, T, Y, X, S samples, Q unknown).
    channel_axis : int
    channel_axis_source : str
        ``"file"``, ``"argument"`` or ``"channel-first convention"``.
    row_axis : int
        The axis read in chunks (Y).
    channel_names : tuple of str or None
    pixel_size_um : tuple of float (y, x) or None
    """

    path: Path
    shape: tuple[int, ...]
    dtype: np.dtype
    axes: str
    channel_axis: int
    channel_axis_source: str
    row_axis: int
    channel_names: tuple[str, ...] | None = None
    pixel_size_um: tuple[float, float] | None = None
    data_offset: int | None = field(default=None, repr=False)
    file_dtype: np.dtype | None = field(default=None, repr=False)

    @property
    def n_channels(self) -> int:
        return self.shape[self.channel_axis]

    @property
    def spatial_shape(self) -> tuple[int, ...]:
        """Shape without the channel axis."""
        return tuple(n for i, n in enumerate(self.shape) if i != self.channel_axis)

    @property
    def spatial_axes(self) -> str:
        return "".join(a for i, a in enumerate(self.axes) if i != self.channel_axis)

    @property
    def n_rows(self) -> int:
        return self.shape[self.row_axis]


class RowReader:
    """Reading a stack by blocks of rows: what the TIFF and the OME-Zarr readers share.

    A subclass sets ``info`` (a :class:`StackInfo`) in ``__init__(info)`` and gives
    :meth:`read_rows` (after :meth:`_check_rows`) and :meth:`close`.  A reader is a context
    manager and pickles as its ``info`` alone: the file is reopened where it is used.
    """

    info: StackInfo

    def __getstate__(self):
        return {"info": self.info}

    def __setstate__(self, state):
        self.__init__(state["info"])

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:  # pragma: no cover - every reader has its own
        raise NotImplementedError

    def _check_rows(self, r0: int, r1: int) -> None:
        if not 0 <= r0 <= r1 <= self.info.n_rows:
            raise input_error("rows", f"{r0}:{r1} outside 0:{self.info.n_rows}", "ask for rows inside the image")

    def read_rows(self, r0: int, r1: int) -> np.ndarray:  # pragma: no cover - every reader has its own
        """Rows ``r0:r1`` of the row (Y) axis, all other axes whole, in the file's axis order."""
        raise NotImplementedError

    def read_rows_channel_first(self, r0: int, r1: int) -> np.ndarray:
        """Rows ``r0:r1`` with the channel axis moved to the front."""
        return np.moveaxis(self.read_rows(r0, r1), self.info.channel_axis, 0)

    def iter_row_blocks(self, rows_per_block: int) -> Iterator[tuple[int, int]]:
        """``(r0, r1)`` pairs covering all rows."""
        n = self.info.n_rows
        step = max(1, int(rows_per_block))
        for r0 in range(0, n, step):
            yield r0, min(n, r0 + step)

    def read(self) -> np.ndarray:
        """The whole stack in the file's axis order."""
        return self.read_rows(0, self.info.n_rows)
