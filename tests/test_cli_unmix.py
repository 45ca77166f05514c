"""``probeplan unmix`` end to end: outputs, bad input (exit 2, no output), folders, resume, dask."""

import json

import numpy as np
import pytest
import tifffile

from probeplan.cli.main import main
from probeplan.io.stacks import read_stack

M = np.array([[5, 1, 0.5], [3, 3, 1], [1, 4, 2], [0.5, 2, 4], [0.2, 1, 5]], float)
NAMES = [f"ch{i}" for i in range(5)]


def _stack(path, seed=0, shape=(40, 48)):
    rng = np.random.default_rng(seed)
    truth = rng.uniform(50, 150, (3, *shape))
    data = rng.poisson(np.einsum("ck,kyx->cyx", M, truth)).astype(np.uint16)
    tifffile.imwrite(path, data, ome=True, photometric="minisblack",
                     metadata={"axes": "CYX", "Channel": {"Name": NAMES}, "PhysicalSizeX": 2.0, "PhysicalSizeY": 2.0})
    return data, truth


def _refs(path, matrix=M, names=NAMES):
    rows = zip(names, matrix, strict=True)
    lines = ["channel,dotA,dotB,dotC"] + [f"{n}," + ",".join(str(v) for v in row) for n, row in rows]
    path.write_text("\n".join(lines) + "\n")
    return path


def _files(folder):
    return sorted(p.name for p in folder.iterdir())


def test_single_stack_outputs(tmp_path, capsys):
    data, truth = _stack(tmp_path / "s.ome.tif")
    ref = _refs(tmp_path / "ref.csv")
    out = tmp_path / "out" / "a.ome.tif"
    out.parent.mkdir()
    rc = main(["unmix", str(tmp_path / "s.ome.tif"), "--references", str(ref), "--out", str(out), "--json",
               "--roi", "t:0,0,10,10", "--roi", "background:20,20,40,40", "--memory-mb", "0.05"])
    assert rc == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["stacks"][0]["status"] == "done"
    assert _files(out.parent) == ["a.ome.tif", "a_overlay.png", "a_qc.json", "a_residual.tif", "a_roi.csv",
                                  "a_stderr.tif", "probeplan_unmix_manifest.json"]
    ab, info = read_stack(out)
    assert info.channel_names == ("dotA", "dotB", "dotC") and info.pixel_size_um == (2.0, 2.0)
    assert ab.dtype == np.float32
    # chunked file pipeline equals the in-memory library call (column-sum normalised references)
    from probeplan.unmixing.pipeline import unmix

    expected = unmix(data, M / M.sum(axis=0))
    np.testing.assert_allclose(ab, expected.astype(np.float32), rtol=1e-6)
    qc = json.loads((out.parent / "a_qc.json").read_text())
    assert qc["n_pixels"] == 40 * 48 and qc["rows_per_chunk"] < 40
    assert "drift apart with depth" in qc["depth_caution"]
    assert (out.parent / "a_overlay.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    se, _ = read_stack(out.parent / "a_stderr.tif")
    assert se.shape == ab.shape and np.all(se > 0)


@pytest.mark.parametrize("case", ["channels", "truncated", "empty", "nan_ref", "neg_ref", "rank", "out_is_input"])
def test_bad_input_exit_2_and_no_output(tmp_path, capsys, case):
    stack = tmp_path / "s.ome.tif"
    _stack(stack)
    ref = _refs(tmp_path / "ref.csv")
    out = tmp_path / "res" / "a.tif"
    out.parent.mkdir()
    if case == "channels":
        ref = _refs(tmp_path / "ref.csv", M[:4], NAMES[:4])
    elif case == "truncated":
        raw = stack.read_bytes()
        stack.write_bytes(raw[: len(raw) // 2])
    elif case == "empty":
        stack.write_bytes(b"")
    elif case == "nan_ref":
        ref.write_text(ref.read_text().replace("3.0,3.0", "nan,3.0"))
    elif case == "neg_ref":
        ref.write_text(ref.read_text().replace("3.0,3.0", "-3.0,3.0"))
    elif case == "rank":
        collinear = M.copy()
        collinear[:, 2] = 2 * collinear[:, 0]
        ref = _refs(tmp_path / "ref.csv", collinear)
    elif case == "out_is_input":
        out = stack
    before = _files(tmp_path)
    rc = main(["unmix", str(stack), "--references", str(ref), "--out", str(out)])
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert len(err.splitlines()) == 1 and "; " in err
    assert any(s in err for s in ("s.ome.tif", "ref.csv", "--out"))
    assert _files(tmp_path) == before
    assert _files(tmp_path / "res") == []


def test_folder_resume_and_checksums(tmp_path, capsys):
    folder = tmp_path / "stacks"
    folder.mkdir()
    for i in range(2):
        _stack(folder / f"m{i}.ome.tif", seed=i)
    ref = _refs(tmp_path / "ref.csv")
    out = tmp_path / "out"
    args = ["unmix", str(folder), "--references", str(ref), "--out", str(out), "--json"]
    assert main(args) == 0
    first = json.loads(capsys.readouterr().out)
    assert [s["status"] for s in first["stacks"]] == ["done", "done"]
    assert (out / "m0_qc.json").exists() and (out / "m1.ome.tif").exists()
    assert main([*args, "--resume"]) == 0
    assert [s["status"] for s in json.loads(capsys.readouterr().out)["stacks"]] == ["skipped (done)"] * 2
    (out / "m1_overlay.png").write_bytes(b"damaged")  # a changed output fails its checksum
    assert main([*args, "--resume"]) == 0
    assert [s["status"] for s in json.loads(capsys.readouterr().out)["stacks"]] == ["skipped (done)", "done"]


def test_interrupt_leaves_no_partial_file(tmp_path, monkeypatch):
    import probeplan.unmixing.pipeline as um

    _stack(tmp_path / "s.ome.tif")
    ref = _refs(tmp_path / "ref.csv")
    calls = {"n": 0}
    real = um.unmix_block

    def interrupted(*a, **k):
        calls["n"] += 1
        if calls["n"] == 2:
            raise KeyboardInterrupt
        return real(*a, **k)

    monkeypatch.setattr(um, "unmix_block", interrupted)
    (tmp_path / "res").mkdir()
    rc = main(["unmix", str(tmp_path / "s.ome.tif"), "--references", str(ref), "--out", str(tmp_path / "res" / "a.tif"),
               "--memory-mb", "0.05"])
    assert rc == 130 and calls["n"] == 2
    assert _files(tmp_path / "res") == []


@pytest.mark.slow
@pytest.mark.parametrize("processes", [False, True])
def test_local_cluster_equals_local_run_bit_for_bit(tmp_path, processes):
    distributed = pytest.importorskip("distributed")
    _stack(tmp_path / "s.ome.tif", shape=(64, 40))
    ref = _refs(tmp_path / "ref.csv")
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    common = ["unmix", str(tmp_path / "s.ome.tif"), "--references", str(ref), "--memory-mb", "0.05"]
    assert main([*common, "--out", str(tmp_path / "a" / "x.tif")]) == 0
    # processes=False needs protocol="tcp" when a host is given (the in-process transport takes no host)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=processes, host="127.0.0.1", protocol="tcp",
                                  dashboard_address="127.0.0.1:0") as cluster:
        assert main([*common, "--out", str(tmp_path / "b" / "x.tif"), "--scheduler", cluster.scheduler_address]) == 0
    for name in ("x.tif", "x_stderr.tif", "x_residual.tif"):
        a = tifffile.imread(tmp_path / "a" / name)
        b = tifffile.imread(tmp_path / "b" / name)
        assert a.tobytes() == b.tobytes()  # bit for bit
    qa = json.loads((tmp_path / "a" / "x_qc.json").read_text())
    qb = json.loads((tmp_path / "b" / "x_qc.json").read_text())
    assert qa["residual_rms"] == qb["residual_rms"] and qa["n_constrained"] == qb["n_constrained"]


def test_unreachable_scheduler(tmp_path, capsys):
    _stack(tmp_path / "s.ome.tif")
    ref = _refs(tmp_path / "ref.csv")
    (tmp_path / "r").mkdir()
    rc = main(["unmix", str(tmp_path / "s.ome.tif"), "--references", str(ref), "--out", str(tmp_path / "r" / "a.tif"),
               "--scheduler", "tcp://127.0.0.1:1"])
    assert rc == 2 and "--scheduler" in capsys.readouterr().err
    assert _files(tmp_path / "r") == []
