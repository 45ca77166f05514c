"""File layouts cameras and converters write: channels last, ImageJ hyperstacks, one plane per file.

Files are written with tifffile (the reference writer of these layouts); the reader must give
the same pixels channel-first, with channel names and pixel size where the file carries them.
"""

from __future__ import annotations

import numpy as np
import pytest
import tifffile

from probeplan.errors import InputError
from probeplan.io.stacks import open_stack, read_stack


@pytest.fixture
def cyx():
    return np.random.default_rng(0).integers(0, 4000, (4, 12, 10)).astype(np.uint16)


def test_plain_channels_last_with_channel_axis(tmp_path, cyx):
    p = tmp_path / "yxc.tif"
    tifffile.imwrite(p, np.moveaxis(cyx, 0, -1), photometric="minisblack")
    with open_stack(p, channel_axis=2) as r:
        assert r.info.n_channels == 4 and r.info.spatial_shape == (12, 10)
        np.testing.assert_array_equal(r.read_rows_channel_first(0, 12), cyx)
        np.testing.assert_array_equal(r.read_rows_channel_first(3, 7), cyx[:, 3:7])


def test_rgb_like_samples_are_channels(tmp_path, cyx):
    p = tmp_path / "rgb.tif"
    tifffile.imwrite(p, np.moveaxis(cyx[:3], 0, -1), photometric="rgb")
    data, info = read_stack(p)
    assert info.channel_axis_source == "file"
    np.testing.assert_array_equal(np.moveaxis(data, info.channel_axis, 0), cyx[:3])


def test_imagej_hyperstack_labels_and_calibration(tmp_path, cyx):
    p = tmp_path / "ij.tif"
    tifffile.imwrite(p, cyx, imagej=True, resolution=(1 / 0.65, 1 / 0.65),
                     metadata={"axes": "CYX", "Labels": ["a", "b", "c", "d"], "unit": "um"})
    data, info = read_stack(p)
    assert info.channel_names == ("a", "b", "c", "d")
    assert info.pixel_size_um == pytest.approx((0.65, 0.65), rel=1e-6)
    np.testing.assert_array_equal(data, cyx)


def test_single_plane_only_when_asked(tmp_path, cyx):
    p = tmp_path / "plane.tif"
    tifffile.imwrite(p, cyx[0])
    with pytest.raises(InputError, match="no channel axis"):
        open_stack(p)
    with open_stack(p, allow_plane=True) as r:
        np.testing.assert_array_equal(r.read_rows_channel_first(0, 12)[0], cyx[0])


def test_compressed_single_plane(tmp_path, cyx):
    p = tmp_path / "plane_zlib.tif"
    tifffile.imwrite(p, cyx[1], compression="zlib")
    with open_stack(p, allow_plane=True) as r:
        np.testing.assert_array_equal(r.read_rows_channel_first(2, 5)[0], cyx[1, 2:5])


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.uint32, np.int16, np.float32, np.float64])
def test_sample_types(tmp_path, cyx, dtype):
    p = tmp_path / "s.tif"
    tifffile.imwrite(p, (cyx // 20).astype(dtype), photometric="minisblack")
    data, info = read_stack(p)
    assert data.dtype == np.dtype(dtype)
    np.testing.assert_array_equal(data, (cyx // 20).astype(dtype))
