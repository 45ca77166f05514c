"""A study streams each acquisition by blocks of rows: the results equal the whole-array computation.

The reference here is computed in the test from whole arrays: each acquisition read whole
(:func:`probeplan.study.runs.load_acquisition`), dark-subtracted and flat-divided with numpy,
unmixed whole by :func:`probeplan.unmixing.pipeline.unmix_stack`, each ROI's pixels solved by
``numpy.linalg.lstsq`` (mean, SD with n - 1, counts), and the automatic ROI thresholded by
``skimage.filters.threshold_otsu`` on the whole map.  The study runs with a memory bound
that splits the 24-row images into blocks of a few rows, with ROIs that cross the block
edges, a dark frame and a flat field whose channels are stored in another order, and both
layouts (one multi-channel file, one file per channel).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import tifffile
from skimage.filters import threshold_otsu

from probeplan.cli.main import main
from probeplan.errors import InputError
from probeplan.io.stacks import read_stack, write_stack
from probeplan.study.runs import StudySettings, load_acquisition, read_table_csv, run_study, study_rows_per_block
from probeplan.study.table import read_study_table
from probeplan.unmixing.pipeline import DEFAULT_MEMORY_MB, unmix_stack
from probeplan.unmixing.references import as_references
from probeplan.unmixing.roi import parse_roi


def _study_helpers():
    # the synthetic study of tests/test_study.py (loaded by path: tests are not a package)
    import importlib.util
    from pathlib import Path

    spec = importlib.util.spec_from_file_location("_study_test_data", Path(__file__).with_name("test_study.py"))
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod.CHANNELS, mod.make_study


CHANNELS, make_study = _study_helpers()

#: Rectangle, ellipse and polygon, each crossing the edges of blocks of 5 rows (0-5, 5-10, ...).
ROIS = ("tumour:ellipse:8,8,5,5", "background:14,0,24,24", "band:polygon:0,3,20,3,20,11,0,11")
MEMORY_MB = 0.04  # 5 rows of 24 x 24 pixels, 3 uint16 channels, 2 components


@pytest.fixture(scope="module")
def streamed(tmp_path_factory):
    folder = tmp_path_factory.mktemp("stream")
    csv, refs = make_study(folder, animals=("ctrl", "treated"), per_channel=(0,), seed=11)
    rng = np.random.default_rng(4)
    # channels stored in reverse order: matched by name, read by rows
    write_stack(folder / "dark.tif", rng.uniform(5, 10, (3, 24, 24)), channel_names=CHANNELS[::-1])
    write_stack(folder / "flat.tif", rng.uniform(0.8, 1.2, (3, 24, 24)), channel_names=CHANNELS[::-1])
    settings = StudySettings(rois=ROIS, dark_path=folder / "dark.tif", flat_path=folder / "flat.tif",
                             auto_rois=("found=dotA",), memory_limit_mb=MEMORY_MB)
    result = run_study(csv, refs, out_dir=folder / "out", settings=settings)
    return folder, csv, refs, settings, result


def _whole_reference(acq, refs_path, folder):
    """Maps and ROI statistics of one acquisition computed from whole arrays."""
    data, names, _, _ = load_acquisition(acq)
    refs = as_references(str(refs_path), normalise="sum").for_channels(names, where="test")
    M = np.asarray(refs.matrix, dtype=np.float64)

    def correction(name):
        arr, info = read_stack(folder / name)
        return np.moveaxis(arr, info.channel_axis, 0)[[info.channel_names.index(c) for c in names]].astype(float)

    dark, flat = correction("dark.tif"), correction("flat.tif")
    whole = unmix_stack(data, refs, dark=dark, flat=flat)
    y = (data.astype(float) - dark) / flat
    bad = (data >= np.iinfo(data.dtype).max).any(axis=0) | ~np.isfinite(y).all(axis=0)
    plane = whole.abundances[0]
    mask_found = (np.isfinite(plane) & (plane > threshold_otsu(plane[np.isfinite(plane)]))).astype(np.uint8)
    masks = {spec.split(":")[0]: parse_roi(spec, shape=(24, 24)).mask((24, 24)) for spec in ROIS}
    masks["found"] = mask_found.astype(bool)
    stats = {}
    for name, mask in masks.items():
        sel = mask & ~bad
        a = np.linalg.lstsq(M, y[:, sel], rcond=None)[0]
        stats[name] = (a.mean(axis=1), a.std(axis=1, ddof=1), int(sel.sum()), int((mask & bad).sum()))
    return whole, mask_found, stats


def test_blocks_are_several_and_rois_cross_their_edges():
    rows = study_rows_per_block((24, 24), 3, np.uint16, 2, MEMORY_MB)
    assert 1 < rows < 12
    edges = set(range(rows, 24, rows))
    for spec in ROIS:
        ys = np.nonzero(parse_roi(spec, shape=(24, 24)).mask((24, 24)).any(axis=1))[0]
        assert edges & set(range(ys.min() + 1, ys.max() + 1)), spec  # the ROI spans a block edge
    # the default bound holds these images in one block, as the unmix command's helper says
    assert study_rows_per_block((24, 24), 3, np.uint16, 2, DEFAULT_MEMORY_MB) >= 24
    assert StudySettings().memory_limit_mb == DEFAULT_MEMORY_MB


def test_streamed_maps_and_statistics_equal_the_whole_arrays(streamed):
    folder, csv, refs, _, result = streamed
    acqs = read_study_table(csv)
    assert {a.channels is None for a in acqs} == {True, False}  # both layouts
    m = result.measurements
    maps = folder / "out" / "acquisitions"
    for acq in acqs:
        whole, mask_found, stats = _whole_reference(acq, refs, folder)
        # maps: float32 files, equal to the whole-array result cast to float32
        for kind, ref in (("abundance", whole.abundances), ("stderr", whole.standard_error),
                          ("residual", whole.residual_rms)):
            got = tifffile.imread(maps / f"{acq.key}_{kind}.ome.tif")
            np.testing.assert_array_equal(got, ref.astype(np.float32), err_msg=f"{acq.key} {kind}")
        np.testing.assert_array_equal(tifffile.imread(maps / f"{acq.key}_found_auto_roi.tif"), mask_found)
        rows = m[m["acquisition"] == acq.key]
        for name, (mean, sd, n, excluded) in stats.items():
            r = rows[rows["roi"] == name].set_index("component").loc[["dotA", "dotB"]]
            scale = np.abs(mean).max()  # means near zero: compared on the ROI's own scale
            np.testing.assert_allclose(r["mean"], mean, rtol=1e-12, atol=1e-12 * scale)
            np.testing.assert_allclose(r["sd"], sd, rtol=1e-12)
            np.testing.assert_allclose(r["se"], sd / np.sqrt(n), rtol=1e-12)
            assert (r["n_pixels"] == n).all() and (r["n_excluded"] == excluded).all()
            np.testing.assert_allclose(r["tbr"], mean / stats["background"][0], rtol=1e-11)


def test_memory_bound_on_the_command_line_changes_nothing(streamed, tmp_path):
    """--memory-mb: blocks of a few rows give the tables of one block of the whole image."""
    folder, csv, refs, _, result = streamed
    out = tmp_path / "out"
    args = ["study", str(csv), "--references", str(refs), "--out", str(out), "--dark", str(folder / "dark.tif"),
            "--flat", str(folder / "flat.tif"), *sum((["--roi", r] for r in ROIS), []), "--no-maps"]
    assert main([*args, "--memory-mb", str(MEMORY_MB)]) == 0
    small = read_table_csv(out / "measurements.csv")
    assert main([*args[:5], str(tmp_path / "one"), *args[6:]]) == 0  # the default bound: one block
    one = read_table_csv(tmp_path / "one" / "measurements.csv")
    pd.testing.assert_frame_equal(small.drop(columns=["mean", "se", "tbr", "tbr_se", "sd"]),
                                  one.drop(columns=["mean", "se", "tbr", "tbr_se", "sd"]))
    np.testing.assert_allclose(small[["mean", "se", "tbr", "sd"]], one[["mean", "se", "tbr", "sd"]], rtol=1e-12,
                               atol=1e-9)
    drawn = result.measurements[result.measurements["roi"] != "found"].reset_index(drop=True)
    np.testing.assert_allclose(small["mean"], drawn["mean"], rtol=1e-12, atol=1e-9)


def test_bad_memory_bound_is_refused(streamed):
    _, csv, refs, settings, _ = streamed
    import dataclasses

    with pytest.raises(InputError, match="memory_limit_mb"):
        run_study(csv, refs, settings=dataclasses.replace(settings, memory_limit_mb=0.0))


def test_planes_of_a_z_stack_and_invalid_pixels_stream_too(tmp_path):
    """A float32 C x Z x Y x X stack with a NaN pixel, weighted least squares: ROIs pool the planes."""
    M = np.array([[0.6, 0.1], [0.3, 0.3], [0.1, 0.6]])
    rng = np.random.default_rng(6)
    ab = np.full((2, 3, 20, 22), 200.0)
    ab[0, :, 4:12, 3:12] = 900.0
    y = rng.poisson(np.einsum("ck,kzyx->czyx", M, ab)).astype(np.float32)
    y[1, 0, 5, 5] = np.nan
    write_stack(tmp_path / "z.tif", y, channel_names=CHANNELS, axes="CZYX")
    (tmp_path / "refs.csv").write_text("channel,dotA,dotB\n" + "".join(
        f"{c},{M[i, 0]},{M[i, 1]}\n" for i, c in enumerate(CHANNELS)))
    (tmp_path / "s.csv").write_text("animal,group,time_h,file\nm1,g,1,z.tif\n")
    rois = ("t:3,4,12,12", "background:14,0,22,20")
    r = run_study(tmp_path / "s.csv", tmp_path / "refs.csv", out_dir=tmp_path / "out", method="wls", rois=rois,
                  auto_rois=["found=dotA"], memory_limit_mb=0.02)
    assert study_rows_per_block((3, 20, 22), 3, np.float32, 2, 0.02) < 8
    whole = unmix_stack(y, as_references(str(tmp_path / "refs.csv"), normalise="sum"), method="wls")
    maps = tmp_path / "out" / "acquisitions"
    np.testing.assert_array_equal(tifffile.imread(maps / "m1_1h_abundance.ome.tif"), whole.abundances)
    with np.errstate(all="ignore"):
        plane = np.nanmean(whole.abundances[0], axis=0)
    found = np.isfinite(plane) & (plane > threshold_otsu(plane[np.isfinite(plane)]))
    np.testing.assert_array_equal(tifffile.imread(maps / "m1_1h_found_auto_roi.tif"), found.astype(np.uint8))
    Mn = M / M.sum(axis=0)
    masks = {spec.split(":")[0]: parse_roi(spec, shape=(20, 22)).mask((20, 22)) for spec in rois}
    masks["found"] = found
    bad = ~np.isfinite(y).all(axis=0)
    for name, mask in masks.items():
        sel = np.broadcast_to(mask, bad.shape) & ~bad
        a = np.linalg.lstsq(Mn, y[:, sel].astype(float), rcond=None)[0]
        row = r.measurements[r.measurements["roi"] == name].set_index("component").loc[["dotA", "dotB"]]
        np.testing.assert_allclose(row["mean"], a.mean(axis=1), rtol=1e-12)
        np.testing.assert_allclose(row["sd"], a.std(axis=1, ddof=1), rtol=1e-12)
        assert (row["n_pixels"] == sel.sum()).all()
        assert (row["n_excluded"] == (np.broadcast_to(mask, bad.shape) & bad).sum()).all()


def test_automatic_roi_on_a_flat_map_is_refused(tmp_path):
    """Otsu's threshold needs two levels: a component absent everywhere (its NNLS map all 0) is refused."""
    M = np.array([[0.6, 0.1], [0.3, 0.3], [0.1, 0.6]])
    y = np.einsum("ck,kyx->cyx", M, np.stack([np.zeros((16, 16)), np.full((16, 16), 300.0)]))
    write_stack(tmp_path / "a.tif", y, channel_names=CHANNELS)
    (tmp_path / "refs.csv").write_text("channel,dotA,dotB\n" + "".join(
        f"{c},{M[i, 0]},{M[i, 1]}\n" for i, c in enumerate(CHANNELS)))
    (tmp_path / "s.csv").write_text("animal,group,time_h,file\nm1,g,1,a.tif\n")
    with pytest.raises(InputError, match="automatic ROI 'found'.*flat or empty"):
        run_study(tmp_path / "s.csv", tmp_path / "refs.csv", rois=["background:0,0,4,4"], auto_rois=["found=dotA"],
                  memory_limit_mb=0.02)
