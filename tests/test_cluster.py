"""Distributed runs on a small dask LocalCluster: relative paths, folders, ROIs, and the bounded errors."""

import json
import time

import numpy as np
import pytest
import tifffile

from probeplan.cli.main import main
from probeplan.errors import InputError

distributed = pytest.importorskip("distributed")

M = np.array([[5, 1, 0.5], [3, 3, 1], [1, 4, 2], [0.5, 2, 4], [0.2, 1, 5]], float)
NAMES = [f"ch{i}" for i in range(5)]


def _stack(path, seed=0, shape=(40, 48)):
    rng = np.random.default_rng(seed)
    truth = rng.uniform(0, 150, (3, *shape)) * (rng.random((3, *shape)) > 0.4)
    data = rng.poisson(np.einsum("ck,kyx->cyx", M, truth) + 5).astype(np.uint16)
    tifffile.imwrite(path, data, ome=True, photometric="minisblack",
                     metadata={"axes": "CYX", "Channel": {"Name": NAMES}, "PhysicalSizeX": 2.0, "PhysicalSizeY": 2.0})


def _refs(path):
    lines = ["channel,dotA,dotB,dotC"] + [f"{n}," + ",".join(str(v) for v in row) for n, row in zip(NAMES, M, strict=True)]
    path.write_text("\n".join(lines) + "\n")
    return path


def _study_helpers():
    # the synthetic study of tests/test_study.py (loaded by path: tests are not a package)
    import importlib.util
    from pathlib import Path

    spec = importlib.util.spec_from_file_location("_study_test_data", Path(__file__).with_name("test_study.py"))
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod.ROIS, mod.make_study


@pytest.fixture(scope="module")
def cluster():
    # one in-process worker (threads): starts in about a second
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False, host="127.0.0.1",
                                  protocol="tcp", dashboard_address="127.0.0.1:0") as c:
        yield c


def test_relative_paths_and_rois_on_the_cluster(tmp_path, monkeypatch, cluster):
    # the command is given paths relative to its own folder; the worker runs elsewhere
    _stack(tmp_path / "s.ome.tif")
    _refs(tmp_path / "ref.csv")
    labels = np.zeros((40, 48), np.uint8)
    labels[5:15, 5:20] = 1
    tifffile.imwrite(tmp_path / "labels.tif", labels)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    monkeypatch.chdir(tmp_path)
    common = ["unmix", "s.ome.tif", "--references", "ref.csv", "--memory-mb", "0.02", "--roi", "labels.tif",
              "--roi", "background:20,20,40,40"]
    assert main([*common, "--out", "a/x.tif"]) == 0
    assert main([*common, "--out", "b/x.tif", "--scheduler", cluster.scheduler_address]) == 0
    for name in ("x.tif", "x_stderr.tif", "x_residual.tif"):
        assert tifffile.imread(tmp_path / "a" / name).tobytes() == tifffile.imread(tmp_path / "b" / name).tobytes()
    qa = json.loads((tmp_path / "a" / "x_qc.json").read_text())
    qb = json.loads((tmp_path / "b" / "x_qc.json").read_text())
    assert qa["rows_per_chunk"] < 10  # several blocks, gathered from the worker in any order
    for key in ("n_pixels", "n_constrained", "mean_abundance", "fraction_zero", "residual_rms"):
        assert qa[key] == pytest.approx(qb[key], rel=1e-12), key
    ra = (tmp_path / "a" / "x_roi.csv").read_text()
    rb = (tmp_path / "b" / "x_roi.csv").read_text()
    assert ra.splitlines()[0] == rb.splitlines()[0] and len(ra.splitlines()) == len(rb.splitlines())
    # ROI statistics merged from the blocks: the same numbers as the single pass (to rounding)
    import csv

    rows_a = list(csv.DictReader((tmp_path / "a" / "x_roi.csv").open()))
    rows_b = list(csv.DictReader((tmp_path / "b" / "x_roi.csv").open()))
    for x, y in zip(rows_a, rows_b, strict=True):
        for key in ("mean", "sd", "tbr"):
            assert float(x[key]) == pytest.approx(float(y[key]), rel=1e-9)


def test_folder_one_task_per_stack(tmp_path, cluster):
    (tmp_path / "in").mkdir()
    for i in range(3):
        _stack(tmp_path / "in" / f"m{i}.ome.tif", seed=i)
    ref = _refs(tmp_path / "ref.csv")
    assert main(["unmix", str(tmp_path / "in"), "--references", str(ref), "--out", str(tmp_path / "loc")]) == 0
    args = ["unmix", str(tmp_path / "in"), "--references", str(ref), "--out", str(tmp_path / "dist"),
            "--scheduler", cluster.scheduler_address]
    assert main(args) == 0
    for i in range(3):
        a = tifffile.imread(tmp_path / "loc" / f"m{i}.ome.tif")
        b = tifffile.imread(tmp_path / "dist" / f"m{i}.ome.tif")
        assert a.tobytes() == b.tobytes()
    manifest = json.loads((tmp_path / "dist" / "probeplan_unmix_manifest.json").read_text())
    assert sorted(manifest["entries"]) == [f"m{i}.ome.tif" for i in range(3)]
    before = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "dist").iterdir() if p.suffix == ".tif"}
    assert main([*args, "--resume"]) == 0  # checksums recorded by the workers let the rerun skip everything
    after = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "dist").iterdir() if p.suffix == ".tif"}
    assert before == after


def test_unreachable_scheduler_is_one_line_within_seconds(tmp_path, capsys):
    _stack(tmp_path / "s.ome.tif")
    ref = _refs(tmp_path / "ref.csv")
    (tmp_path / "r").mkdir()
    t = time.monotonic()
    rc = main(["unmix", str(tmp_path / "s.ome.tif"), "--references", str(ref), "--out", str(tmp_path / "r" / "a.tif"),
               "--scheduler", "tcp://127.0.0.1:1"])
    assert time.monotonic() - t < 10
    err = capsys.readouterr().err.strip()
    assert rc == 2 and err.count("\n") == 0 and "--scheduler" in err and "cannot reach" in err
    assert list((tmp_path / "r").iterdir()) == []


def test_scheduler_without_workers_is_refused_within_seconds():
    from probeplan.unmixing.cluster import connect

    with distributed.LocalCluster(n_workers=0, processes=False, host="127.0.0.1", protocol="tcp",
                                  dashboard_address="127.0.0.1:0") as empty:
        t = time.monotonic()
        with pytest.raises(InputError, match="has no workers.*dask worker"):
            connect(empty.scheduler_address, worker_wait_s=1.0)
        assert time.monotonic() - t < 10


def test_study_one_task_per_acquisition(tmp_path, monkeypatch, cluster):
    # the same study (relative paths, run from its folder) locally and on the cluster: equal tables;
    # the cluster run's manifest lets a local rerun skip every acquisition
    import pandas as pd
    ROIS, make_study = _study_helpers()

    from probeplan.study.runs import read_table_csv

    make_study(tmp_path, animals=("ctrl", "ctrl", "treated", "treated"))
    monkeypatch.chdir(tmp_path)
    rois = sum((["--roi", r] for r in ROIS), [])
    assert main(["study", "study.csv", "--references", "refs.csv", "--out", "loc", *rois, "--json"]) == 0
    assert main(["study", "study.csv", "--references", "refs.csv", "--out", "dist", *rois, "--json",
                 "--scheduler", cluster.scheduler_address]) == 0
    for name in ("measurements.csv", "groups.csv", "kinetics.csv"):
        pd.testing.assert_frame_equal(read_table_csv(tmp_path / "loc" / name), read_table_csv(tmp_path / "dist" / name))
    before = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "dist" / "acquisitions").iterdir()}
    assert main(["study", "study.csv", "--references", "refs.csv", "--out", "dist", *rois, "--json"]) == 0
    assert {p.name: p.stat().st_mtime_ns for p in (tmp_path / "dist" / "acquisitions").iterdir()} == before


def test_study_streamed_by_blocks_on_the_cluster(tmp_path, monkeypatch, cluster):
    # the worker streams each acquisition by blocks of a few rows (with an automatic ROI, whose map
    # goes through a temporary file on the worker): tables and maps equal a local run with the same
    # bound, and the tables equal one block per image to 1e-12
    import numpy as np
    import pandas as pd
    import tifffile
    ROIS, make_study = _study_helpers()

    from probeplan.study.runs import read_table_csv

    make_study(tmp_path, animals=("ctrl", "treated"), per_channel=(0,))
    monkeypatch.chdir(tmp_path)
    args = ["study", "study.csv", "--references", "refs.csv", *sum((["--roi", r] for r in ROIS), []),
            "--auto-roi", "found=dotA"]
    small = ["--memory-mb", "0.04"]  # blocks of 5 of the 24 rows
    assert main([*args, "--out", "loc", *small]) == 0
    assert main([*args, "--out", "dist", *small, "--scheduler", cluster.scheduler_address]) == 0
    assert main([*args, "--out", "one"]) == 0
    loc, dist, one = (read_table_csv(tmp_path / d / "measurements.csv") for d in ("loc", "dist", "one"))
    pd.testing.assert_frame_equal(loc, dist)
    num = ["mean", "se", "tbr", "tbr_se", "sd"]
    pd.testing.assert_frame_equal(loc.drop(columns=num), one.drop(columns=num))
    np.testing.assert_allclose(loc[num], one[num], rtol=1e-12, atol=1e-9)
    for f in sorted((tmp_path / "loc" / "acquisitions").glob("*.tif")):
        np.testing.assert_array_equal(tifffile.imread(f), tifffile.imread(tmp_path / "dist" / "acquisitions" / f.name))
        np.testing.assert_array_equal(tifffile.imread(f), tifffile.imread(tmp_path / "one" / "acquisitions" / f.name))


def test_study_unreachable_scheduler(tmp_path, capsys):
    ROIS, make_study = _study_helpers()

    csv, refs = make_study(tmp_path, animals=("ctrl", "treated"))
    t = time.monotonic()
    rc = main(["study", str(csv), "--references", str(refs), "--out", str(tmp_path / "out"), "--roi", ROIS[0],
               "--scheduler", "tcp://127.0.0.1:1"])
    assert time.monotonic() - t < 10
    assert rc == 2 and "cannot reach" in capsys.readouterr().err
    assert not (tmp_path / "out").exists()


def test_zarr_output_on_the_cluster_equals_a_local_run(tmp_path, cluster):
    # workers write whole 512-row chunks of the OME-Zarr output themselves; the values equal a local run
    zarr = pytest.importorskip("zarr")
    _stack(tmp_path / "s.ome.tif", shape=(1100, 40))
    ref = _refs(tmp_path / "ref.csv")
    common = ["unmix", str(tmp_path / "s.ome.tif"), "--references", str(ref), "--memory-mb", "0.5"]
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    assert main([*common, "--out", str(tmp_path / "a" / "x.ome.zarr")]) == 0
    assert main([*common, "--out", str(tmp_path / "b" / "x.ome.zarr"), "--scheduler", cluster.scheduler_address]) == 0
    a = zarr.open_array(str(tmp_path / "a" / "x.ome.zarr" / "0"), mode="r")[:]
    b = zarr.open_array(str(tmp_path / "b" / "x.ome.zarr" / "0"), mode="r")[:]
    np.testing.assert_array_equal(a, b)
    qb = json.loads((tmp_path / "b" / "x_qc.json").read_text())
    assert qb["rows_per_chunk"] % 512 == 0  # blocks of whole chunks: no two workers share one


def test_folder_on_the_cluster_refuses_a_foreign_output(tmp_path, cluster, capsys):
    # the run's overwrite rule travels with each task: an existing file it did not write is refused
    (tmp_path / "in").mkdir()
    for i in range(2):
        _stack(tmp_path / "in" / f"m{i}.ome.tif", seed=i)
    ref = _refs(tmp_path / "ref.csv")
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "m1.ome.tif").write_bytes(b"someone else's file")
    args = ["unmix", str(tmp_path / "in"), "--references", str(ref), "--out", str(tmp_path / "out"),
            "--scheduler", cluster.scheduler_address]
    assert main(args) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "m1.ome.tif" in err and "--overwrite" in err
    assert (tmp_path / "out" / "m1.ome.tif").read_bytes() == b"someone else's file"
    assert main([*args, "--overwrite"]) == 0
    assert tifffile.imread(tmp_path / "out" / "m1.ome.tif").shape == (3, 40, 48)


def test_roi_file_with_a_label_image_on_the_cluster(tmp_path, cluster):
    # an ROI file whose region is a label of a label image: the workers get that image once and
    # the ROI table equals a local run's
    from probeplan.unmixing.roi import Roi
    from probeplan.unmixing.roifile import write_roi_file

    _stack(tmp_path / "s.ome.tif")
    ref = _refs(tmp_path / "ref.csv")
    labels = np.zeros((40, 48), np.uint16)
    labels[5:15, 5:20] = 3
    tifffile.imwrite(tmp_path / "labels.tif", labels)
    write_roi_file(tmp_path / "rois.json", [Roi("tumour", label=3, labels_file="labels.tif")])
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    common = ["unmix", str(tmp_path / "s.ome.tif"), "--references", str(ref), "--memory-mb", "0.02",
              "--roi", str(tmp_path / "rois.json"), "--roi", "background:20,20,40,40"]
    assert main([*common, "--out", str(tmp_path / "a" / "x.tif")]) == 0
    assert main([*common, "--out", str(tmp_path / "b" / "x.tif"), "--scheduler", cluster.scheduler_address]) == 0
    import csv

    rows_a = list(csv.DictReader((tmp_path / "a" / "x_roi.csv").open()))
    rows_b = list(csv.DictReader((tmp_path / "b" / "x_roi.csv").open()))
    assert {r["roi"] for r in rows_b} == {"tumour", "background"}
    assert any(r["roi"] == "tumour" and int(r["n_pixels"]) == 150 for r in rows_b)
    for x, y in zip(rows_a, rows_b, strict=True):
        for key in ("n_pixels", "mean", "sd"):
            assert float(x[key]) == pytest.approx(float(y[key]), rel=1e-9), key


def test_study_reads_ome_zarr_by_fsspec_url_locally_and_on_the_cluster(tmp_path, cluster):
    # the study's images as OME-Zarr named by file:// URLs (read through fsspec, where they lie): the same
    # measurements as the table naming them by path, locally and on the cluster; a rerun skips them all
    import pandas as pd

    from probeplan.io.stacks import read_stack, write_stack
    from probeplan.study.runs import read_table_csv

    ROIS, make_study = _study_helpers()
    csv, refs = make_study(tmp_path, animals=("ctrl", "treated"), per_channel=())
    lines = csv.read_text().splitlines()
    by_path, by_url = [lines[0]], [lines[0]]
    for line in lines[1:]:
        animal, group, t, f, ch = line.split(",")
        data, info = read_stack(tmp_path / f)
        z = tmp_path / f.replace(".tif", ".ome.zarr")
        write_stack(z, data, channel_names=info.channel_names, dtype=data.dtype)
        by_path.append(f"{animal},{group},{t},{z.name},{ch}")
        by_url.append(f"{animal},{group},{t},{z.absolute().as_uri()},{ch}")
    (tmp_path / "paths.csv").write_text("\n".join(by_path) + "\n")
    (tmp_path / "urls.csv").write_text("\n".join(by_url) + "\n")
    rois = sum((["--roi", r] for r in ROIS), [])
    common = ["--references", str(refs), *rois, "--json"]
    assert main(["study", str(tmp_path / "paths.csv"), "--out", str(tmp_path / "p"), *common]) == 0
    assert main(["study", str(tmp_path / "urls.csv"), "--out", str(tmp_path / "u"), *common]) == 0
    assert main(["study", str(tmp_path / "urls.csv"), "--out", str(tmp_path / "c"), *common,
                 "--scheduler", cluster.scheduler_address]) == 0
    expected = read_table_csv(tmp_path / "p" / "measurements.csv")
    for out in ("u", "c"):
        pd.testing.assert_frame_equal(read_table_csv(tmp_path / out / "measurements.csv"), expected)
    before = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "c" / "acquisitions").iterdir()}
    assert main(["study", str(tmp_path / "urls.csv"), "--out", str(tmp_path / "c"), *common]) == 0
    assert {p.name: p.stat().st_mtime_ns for p in (tmp_path / "c" / "acquisitions").iterdir()} == before
    # a URL that holds no OME-Zarr image is refused on its line
    (tmp_path / "bad.csv").write_text(by_url[0] + "\n" + by_url[1].replace(".ome.zarr", ".missing.zarr") + "\n")
    with pytest.raises(InputError, match=r"bad.csv:2: file .* is not an OME-Zarr image"):
        from probeplan.study.table import read_study_table

        read_study_table(tmp_path / "bad.csv")
