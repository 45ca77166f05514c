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


def test_unmix_api_matches_channels_by_name(tmp_path):
    """The same stack with its channels in another order gives the same abundances (matched by name)."""
    import pandas as pd

    from probeplan.io.stacks import write_stack
    from probeplan.unmixing.pipeline import unmix

    M = np.array([[0.6, 0.1], [0.3, 0.3], [0.1, 0.6]])
    refs = pd.DataFrame({"channel": ["a", "b", "c"], "dotA": M[:, 0], "dotB": M[:, 1]})
    ab = np.stack([np.full((4, 5), 100.0), np.full((4, 5), 30.0)])
    stack = np.einsum("ck,kyx->cyx", M, ab)
    order = [2, 0, 1]
    expected = unmix(stack, refs, channel_names=["a", "b", "c"])
    np.testing.assert_allclose(expected[:, 0, 0] / expected[:, 0, 0].sum(), [100 / 130, 30 / 130], rtol=1e-9)
    np.testing.assert_allclose(unmix(stack[order], refs, channel_names=["c", "a", "b"]), expected, rtol=1e-9)
    p = tmp_path / "reordered.tif"
    write_stack(p, stack[order], channel_names=["c", "a", "b"])
    np.testing.assert_allclose(unmix(str(p), refs), expected, rtol=1e-5)
    with pytest.raises(InputError, match="no row for channel"):
        unmix(stack, refs, channel_names=["a", "b", "x"])


def test_unmix_folder_names_differing_after_the_first_dot(tmp_path, capsys):
    from pathlib import Path

    from probeplan.cli.main import main

    demo = Path(__file__).resolve().parents[1] / "demo_tissue"
    folder = tmp_path / "stacks"
    folder.mkdir()
    for name in ("mouse1.day1.tif", "mouse1.day3.tif"):
        (folder / name).write_bytes((demo / "stack.tif").read_bytes())
    out = tmp_path / "out"
    assert main(["unmix", str(folder), "--references", str(demo / "references.csv"), "--out", str(out)]) == 0
    assert (out / "mouse1.day1.ome.tif").is_file() and (out / "mouse1.day3.ome.tif").is_file()
    _, info = read_stack(out / "mouse1.day1_stderr.tif")
    assert all(n.endswith("standard error") for n in info.channel_names)
    import json

    qc = json.loads((out / "mouse1.day1_qc.json").read_text())
    assert qc["abundance_unit"] == "counts (summed over all channels)"


def test_unmix_with_references_from_controls_on_the_command_line(tmp_path, capsys):
    """Spectra measured from the demo's controls agree with the channel model that made them (demo references)."""
    from pathlib import Path

    from probeplan.cli.main import main
    from probeplan.unmixing.references import read_references_csv

    demo = Path(__file__).resolve().parents[1] / "demo_tissue"
    out = tmp_path / "a.ome.tif"
    argv = ["unmix", str(demo / "stack.tif"), "--out", str(out), "--unlabelled", str(demo / "unlabelled.tif")]
    for k, name in enumerate(("probe A (700)", "probe B (780)", "probe C (880)")):
        argv += ["--control", f"{name}={demo / f'control_{k + 1}.tif'}"]
    assert main(argv) == 0
    measured = read_references_csv(tmp_path / "a_references.csv")
    model = read_references_csv(demo / "references.csv")
    for k in range(3):
        j = int(np.argmax(model.matrix[:, k]))
        assert measured.matrix[j, k] == pytest.approx(model.matrix[j, k], rel=0.05)
    assert main(["unmix", str(demo / "stack.tif"), "--out", str(tmp_path / "b.ome.tif"),
                 "--control", f"x={demo / 'control_1.tif'}"]) == 2
    assert "--unlabelled" in capsys.readouterr().err


def test_ome_zarr_read_write_and_unmix(tmp_path, capsys):
    """OME-Zarr (NGFF 0.4) written and read back with names and pixel size; unmix reads and writes it."""
    from pathlib import Path

    import zarr

    from probeplan.cli.main import main
    from probeplan.io.ngff import inspect_ome_zarr
    from probeplan.io.stacks import write_stack

    demo = Path(__file__).resolve().parents[1] / "demo_tissue"
    data, info = read_stack(demo / "stack.tif")
    p = tmp_path / "stack.ome.zarr"
    write_stack(p, data, channel_names=info.channel_names, pixel_size_um=(6.5, 6.5), dtype=data.dtype)
    attrs = dict(zarr.open_group(str(p), mode="r").attrs)
    assert attrs["multiscales"][0]["version"] == "0.4"
    assert [a["name"] for a in attrs["multiscales"][0]["axes"]] == ["c", "y", "x"]
    back, binfo = read_stack(p)
    np.testing.assert_array_equal(back, data)
    assert binfo.channel_names == info.channel_names and binfo.pixel_size_um == (6.5, 6.5)
    out = tmp_path / "res" / "a.ome.zarr"
    out.parent.mkdir()
    assert main(["unmix", str(p), "--references", str(demo / "references.csv"), "--out", str(out)]) == 0
    ab, ainfo = read_stack(out)
    ref = tmp_path / "ref.ome.tif"
    assert main(["unmix", str(demo / "stack.tif"), "--references", str(demo / "references.csv"), "--out", str(ref)]) == 0
    np.testing.assert_allclose(ab, read_stack(ref)[0], rtol=1e-6)
    assert ainfo.pixel_size_um == (6.5, 6.5) and (tmp_path / "res" / "a_stderr.ome.zarr").is_dir()
    assert not list((tmp_path / "res").glob(".*.part"))
    stderr_info, _ = inspect_ome_zarr(tmp_path / "res" / "a_stderr.ome.zarr")
    assert all(n.endswith("standard error") for n in stderr_info.channel_names)


def test_ome_zarr_read_from_fsspec_urls(tmp_path):
    """An OME-Zarr image read by fsspec URL (file:// and an in-memory store) equals the one read by path;
    the unmixing of a URL-read stack equals that of the path-read one; a URL that is not an OME-Zarr image
    is refused in one line."""
    import fsspec

    from probeplan.io.ngff import is_ome_zarr
    from probeplan.io.stacks import write_stack
    from probeplan.unmixing.pipeline import unmix

    rng = np.random.default_rng(4)
    data = rng.integers(0, 4000, size=(3, 40, 24)).astype(np.uint16)
    p = tmp_path / "s.ome.zarr"
    write_stack(p, data, channel_names=["a", "b", "c"], pixel_size_um=(2.0, 2.0), dtype=data.dtype)
    local, linfo = read_stack(p)
    memory = fsspec.filesystem("memory")
    memory.put(str(p), "/probeplan-test/s.ome.zarr", recursive=True)
    try:
        for url in (p.absolute().as_uri(), "memory://probeplan-test/s.ome.zarr"):
            assert is_ome_zarr(url)
            back, info = read_stack(url)
            np.testing.assert_array_equal(back, local)
            assert info.channel_names == linfo.channel_names and info.pixel_size_um == (2.0, 2.0)
            assert str(info.path) == url
            with open_stack(url) as reader:  # by blocks of rows, as a worker reads
                np.testing.assert_array_equal(reader.read_rows(10, 17), local[:, 10:17])
        M = np.abs(rng.normal(size=(3, 2))) + 0.1
        np.testing.assert_array_equal(unmix(p.absolute().as_uri(), M), unmix(p, M))
        with pytest.raises(InputError, match="not an OME-Zarr image"):
            read_stack("memory://probeplan-test/missing.ome.zarr")
    finally:
        memory.rm("/probeplan-test", recursive=True)


def test_a_url_given_to_the_unmix_command_is_refused_in_one_line(tmp_path, capsys):
    from probeplan.cli.main import main

    url = (tmp_path / "s.ome.zarr").absolute().as_uri()
    assert main(["unmix", url, "--references", str(tmp_path / "r.csv"), "--out", str(tmp_path / "o.tif")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "is a URL" in err and "study table" in err
