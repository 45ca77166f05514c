"""What is known about an image stack file (:class:`StackInfo`), shared by the TIFF and OME-Zarr readers."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

__all__ = ["StackInfo"]


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
