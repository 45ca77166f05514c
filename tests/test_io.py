"""TIFF / OME-TIFF reading by rows and atomic writing (outside reference: tifffile.imread)."""

import numpy as np
import pytest
import tifffile

from probeplan.errors import InputError
from probeplan.io.stacks import StackWriter, open_stack, read_stack, write_stack


def _ome(path, data, axes, names=None, **meta):
    md = {"axes": axes, **meta}
    if names:
        md["Channel"] = {"Name": names}
    tifffile.imwrite(path, data, ome=True, photometric="minisblack", metadata=md)


def test_round_trip_names_pixel_size(tmp_path):
    data = np.random.default_rng(0).random((3, 5, 7))
    p = write_stack(tmp_path / "a.ome.tif", data, channel_names=["x", "y", "z"], pixel_size_um=(0.25, 0.5))
    back, info = read_stack(p)
    assert back.dtype == np.float32
    np.testing.assert_array_equal(back, data.astype(np.float32))
    assert info.channel_names == ("x", "y", "z") and info.pixel_size_um == (0.25, 0.5)
    np.testing.assert_array_equal(tifffile.imread(p), back)  # outside reader agrees
    assert not list(tmp_path.glob(".*part"))


@pytest.mark.parametrize(("axes", "shape", "c_axis"), [("CYX", (4, 6, 5), 0), ("CZYX", (3, 2, 6, 5), 0),
                                                        ("TCYX", (2, 3, 6, 5), 1)])
def test_axes_from_ome(tmp_path, axes, shape, c_axis):
    data = np.arange(np.prod(shape), dtype=np.uint16).reshape(shape)
    _ome(tmp_path / "s.ome.tif", data, axes, names=[f"c{i}" for i in range(shape[c_axis])],
         PhysicalSizeX=1.5, PhysicalSizeXUnit="nm", PhysicalSizeY=1.5, PhysicalSizeYUnit="nm")
    with open_stack(tmp_path / "s.ome.tif") as r:
        assert r.info.axes == axes and r.info.channel_axis == c_axis and r.info.channel_axis_source == "file"
        assert r.info.pixel_size_um == pytest.approx((1.5e-3, 1.5e-3))
        assert r.info.channel_names == tuple(f"c{i}" for i in range(shape[c_axis]))
        np.testing.assert_array_equal(r.read_rows(2, 5), data[..., 2:5, :])
        np.testing.assert_array_equal(np.moveaxis(r.read(), c_axis, 0), r.read_rows_channel_first(0, 6))
    with pytest.raises(InputError, match="contradicts"):
        open_stack(tmp_path / "s.ome.tif", channel_axis=c_axis + 1)


def test_plain_tiff_channel_axis_rules(tmp_path):
    tifffile.imwrite(tmp_path / "p3.tif", np.zeros((5, 4, 3), np.uint16), photometric="minisblack")
    with open_stack(tmp_path / "p3.tif") as r:
        assert r.info.channel_axis == 0 and r.info.channel_axis_source == "channel-first convention"
    tifffile.imwrite(tmp_path / "p4.tif", np.zeros((2, 5, 4, 3), np.uint16), photometric="minisblack")
    with pytest.raises(InputError, match="channel_axis"):
        open_stack(tmp_path / "p4.tif")
    with open_stack(tmp_path / "p4.tif", channel_axis=1) as r:
        assert r.info.n_channels == 5 and r.info.channel_axis_source == "argument"


def test_compressed_file_reads_through_zarr(tmp_path):
    data = np.random.default_rng(1).integers(0, 4000, (4, 40, 30), dtype=np.uint16)
    tifffile.imwrite(tmp_path / "z.tif", data, compression="zlib", photometric="minisblack", rowsperstrip=8)
    with open_stack(tmp_path / "z.tif") as r:
        assert r.info.data_offset is None
        np.testing.assert_array_equal(r.read_rows(5, 23), data[:, 5:23])


def test_big_endian_file(tmp_path):
    data = np.arange(60, dtype=">u2").reshape(3, 4, 5)
    tifffile.imwrite(tmp_path / "be.tif", data, byteorder=">", photometric="minisblack")
    back, info = read_stack(tmp_path / "be.tif")
    np.testing.assert_array_equal(back, data)
    assert back.dtype.byteorder in ("=", "|")


def test_bad_files(tmp_path):
    (tmp_path / "empty.tif").write_bytes(b"")
    with pytest.raises(InputError, match=r"empty\.tif: the file is empty"):
        open_stack(tmp_path / "empty.tif")
    (tmp_path / "junk.tif").write_bytes(b"not a tiff at all")
    with pytest.raises(InputError, match=r"junk\.tif: cannot be read as TIFF"):
        open_stack(tmp_path / "junk.tif")
    tifffile.imwrite(tmp_path / "full.tif", np.ones((3, 64, 64), np.uint16), photometric="minisblack")
    raw = (tmp_path / "full.tif").read_bytes()
    (tmp_path / "trunc.tif").write_bytes(raw[: len(raw) // 2])
    with pytest.raises(InputError, match=r"trunc\.tif: .*truncated|trunc\.tif: cannot be read"):
        open_stack(tmp_path / "trunc.tif")
    with pytest.raises(InputError, match="not found"):
        open_stack(tmp_path / "missing.tif")


def test_stack_writer_rows_and_abort(tmp_path):
    data = np.random.default_rng(2).random((2, 3, 10, 6)).astype(np.float32)
    with StackWriter(tmp_path / "w.tif", data.shape, axes="CZYX", channel_names=["a", "b"]) as w:
        for r0 in range(0, 10, 4):
            w.write_rows(r0, data[..., r0 : r0 + 4, :])
    back, info = read_stack(tmp_path / "w.tif")
    np.testing.assert_array_equal(back, data)
    assert info.channel_names == ("a", "b")
    with pytest.raises(KeyboardInterrupt):
        with StackWriter(tmp_path / "x.tif", data.shape, axes="CZYX") as w:
            w.write_rows(0, data[..., :4, :])
            raise KeyboardInterrupt
    assert sorted(p.name for p in tmp_path.iterdir()) == ["w.tif"]
