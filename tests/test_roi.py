"""ROI statistics: mean, sample SD and target-to-background ratio (checked against numpy)."""

import numpy as np
import pytest

from probeplan.errors import InputError
from probeplan.unmixing.roi import RoiAccumulator, parse_rectangle, roi_statistics, rois_from_labels, write_roi_csv


def test_rectangle_parsing():
    assert parse_rectangle(" tumour : 1, 2, 3, 4 ").rect == (1, 2, 3, 4)
    for bad in ("tumour", "t:1,2,3", "t:3,0,1,5", "t:-1,0,2,2"):
        with pytest.raises(InputError, match="^roi: "):
            parse_rectangle(bad)
    with pytest.raises(InputError, match="past the image"):
        parse_rectangle("t:0,0,10,10", shape=(5, 5))


def test_statistics_match_numpy_and_blocks_combine(tmp_path):
    rng = np.random.default_rng(0)
    a = rng.normal(10, 2, (2, 3, 20, 16))  # K, Z, Y, X
    a[0, 1, 5, 5] = np.nan
    rois = [parse_rectangle("t:2,3,10,12"), parse_rectangle("background:10,10,16,20")]
    rows = roi_statistics(a, rois, ["p", "q"]).to_dict("records")
    sel = a[:, :, 3:12, 2:10].reshape(2, -1)
    ok = np.isfinite(sel).all(axis=0)
    # outside check: numpy mean and sample standard deviation (ddof=1)
    assert rows[0]["mean"] == pytest.approx(sel[0, ok].mean(), rel=1e-12)
    assert rows[0]["sd"] == pytest.approx(sel[0, ok].std(ddof=1), rel=1e-12)
    assert rows[0]["n_nan"] == 1 and rows[0]["n_pixels"] == ok.sum()
    bgm = a[1, :, 10:20, 10:16].mean()
    assert rows[1]["tbr"] == pytest.approx(sel[1, ok].mean() / bgm, rel=1e-12)
    acc = RoiAccumulator(rois, ["p", "q"])
    for r0 in range(0, 20, 7):
        acc.add(a[..., r0 : r0 + 7, :], r0)
    for x, y in zip(acc.rows(), rows, strict=True):
        for key in ("mean", "sd", "tbr"):
            assert x[key] == pytest.approx(y[key], rel=1e-10)
    out = write_roi_csv(tmp_path / "roi.csv", rows)
    assert out.read_text().splitlines()[0] == "roi,component,n_pixels,n_nan,mean,sd,tbr"


def test_label_rois():
    labels = np.zeros((4, 4), np.uint16)
    labels[:2, :2] = 3
    labels[2:, 2:] = 7
    rois = rois_from_labels(labels)
    assert [r.name for r in rois] == ["label_3", "label_7"]
    a = np.arange(16.0).reshape(1, 4, 4)
    rows = roi_statistics(a, rois, ["p"], labels=labels, background="label_7").to_dict("records")
    assert rows[0]["mean"] == pytest.approx(np.mean([0, 1, 4, 5]))
    assert rows[0]["tbr"] == pytest.approx(2.5 / 12.5)
    with pytest.raises(InputError, match="integer"):
        rois_from_labels(np.zeros((2, 2)))


# --------------------------------------------------------------------------- shapes, ROI files, automatic ROIs

def test_polygon_tracing_a_rectangle_selects_the_rectangle():
    from probeplan.unmixing.roi import parse_roi

    rect = parse_roi("r:3,2,9,7").mask((12, 12))
    poly = parse_roi("p:polygon:3,2,9,2,9,7,3,7").mask((12, 12))
    np.testing.assert_array_equal(rect, poly)
    assert rect.sum() == 6 * 5


def test_ellipse_area_close_to_pi_a_b():
    # area of an ellipse = pi * rx * ry (geometry); pixel counting converges to it for large radii
    from probeplan.unmixing.roi import parse_roi

    m = parse_roi("e:ellipse:100,80,40,25").mask((200, 200))
    assert m.sum() == pytest.approx(np.pi * 40 * 25, rel=0.01)


def test_roi_file_round_trip_with_named_labels(tmp_path):
    import tifffile

    from probeplan.unmixing.roi import Roi, parse_roi
    from probeplan.unmixing.roifile import read_roi_file, write_roi_file

    labels = np.zeros((20, 30), np.uint16)
    labels[2:6, 3:9] = 4
    tifffile.imwrite(tmp_path / "labels.tif", labels)
    rois = [parse_roi("a:1,1,5,5"), parse_roi("b:ellipse:10,10,3,2"), parse_roi("c:polygon:0,0,6,0,3,5"),
            Roi("liver", label=4, labels_file="labels.tif")]
    write_roi_file(tmp_path / "rois.json", rois)
    f = read_roi_file(tmp_path / "rois.json")
    back, lab = f.rois, f.labels
    assert [r.name for r in back] == ["a", "b", "c", "liver"]
    for r0, r1 in zip(rois, back, strict=True):
        np.testing.assert_array_equal(r0.mask((20, 30), labels), r1.mask((20, 30), lab))
    assert back[3].mask((20, 30), lab).sum() == 24


def test_bad_roi_specs_and_files(tmp_path):
    from probeplan.errors import InputError
    from probeplan.unmixing.roi import parse_roi
    from probeplan.unmixing.roifile import read_roi_file

    for spec in ("x:ellipse:1,2,3", "x:ellipse:1,2,0,3", "x:polygon:1,2,3,4", "x:polygon:a,b,c,d,e,f"):
        with pytest.raises(InputError, match="^roi: "):
            parse_roi(spec)
    with pytest.raises(InputError, match="covers no pixel"):
        parse_roi("x:ellipse:500,500,3,3", shape=(20, 20))
    (tmp_path / "r.json").write_text('{"format": "probeplan-rois", "version": 2, '
                                     '"rois": [{"name": "a", "shape": "star"}]}')
    with pytest.raises(InputError, match="star"):
        read_roi_file(tmp_path / "r.json")
    (tmp_path / "r.json").write_text('{"rois": []}')
    with pytest.raises(InputError, match="probeplan-rois"):
        read_roi_file(tmp_path / "r.json")


def test_otsu_threshold_by_blocks_equals_skimage_on_the_whole_map():
    """The histogram gathered by blocks of rows gives skimage's threshold_otsu of the whole map, exactly."""
    from skimage.filters import threshold_otsu

    from probeplan.unmixing.roi import otsu_threshold_by_blocks

    rng = np.random.default_rng(8)
    for trial in range(5):
        img = rng.lognormal(0.0, 1.0 + trial, (61, 47))
        img[rng.random(img.shape) < 0.05] = np.nan
        ok = img[np.isfinite(img)]
        blocks = (img[r0 : r0 + 7] for r0 in range(0, img.shape[0], 7))
        assert otsu_threshold_by_blocks(blocks, (ok.min(), ok.max())) == threshold_otsu(ok)


def test_otsu_roi_finds_a_bright_disc():
    """Otsu's threshold on a two-level image with noise splits the two levels (Otsu 1979)."""
    from probeplan.unmixing.roi import otsu_roi

    rng = np.random.default_rng(4)
    yy, xx = np.mgrid[:64, :64]
    disc = (yy - 30) ** 2 + (xx - 20) ** 2 <= 8**2
    img = np.where(disc, 100.0, 10.0) + rng.normal(0, 5, (64, 64))
    roi, lab = otsu_roi(img, "target")
    assert roi.name == "target"
    # every disc pixel found; Otsu's threshold leans towards the larger class, so a rare background pixel
    # 3 sigma up may join (at most 0.1 % of the image)
    assert (lab.astype(bool) >= disc).all() and (lab.astype(bool) != disc).sum() <= 4


def test_unmix_file_takes_ellipse_and_polygon_rois(tmp_path):
    from pathlib import Path

    from probeplan.unmixing.pipeline import unmix_file
    from probeplan.unmixing.references import read_references_csv

    demo = Path(__file__).resolve().parents[1] / "demo_tissue"
    res = unmix_file(demo / "stack.tif", read_references_csv(demo / "references.csv"), tmp_path / "a.ome.tif",
                     rois=["t:ellipse:38.4,43.5,8,8", "p:polygon:2,100,20,100,20,126,2,126", "background:2,100,20,126"])
    rows = {(r["roi"], r["component"]): r for r in res.roi_rows}
    assert rows[("t", "probe A (700)")]["n_pixels"] == pytest.approx(np.pi * 64, rel=0.1)
    # the polygon traces the background rectangle: identical statistics
    assert rows[("p", "probe A (700)")]["mean"] == rows[("background", "probe A (700)")]["mean"]
