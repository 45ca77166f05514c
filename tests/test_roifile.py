"""The one ROI file: drawn shapes measured with their own pixels, round trips, older forms, refusals.

The reference masks come from scikit-image's ``skimage.draw.polygon`` and ``skimage.draw.ellipse``
(their own point-in-polygon and ellipse code, not ours), which centre pixel (r, c) on (r, c): a
vertex (x, y) of the ROI file (origin at the image's top-left corner) is (y - 0.5, x - 0.5) there.
The shapes below have no pixel centre on their edge, so the two edge conventions cannot differ.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest
import tifffile
from skimage.draw import ellipse as sk_ellipse
from skimage.draw import polygon as sk_polygon

from probeplan.cli.main import main
from probeplan.errors import InputError
from probeplan.io.stacks import write_stack
from probeplan.unmixing.roi import Roi, parse_roi, roi_statistics
from probeplan.unmixing.roifile import (
    ROI_FILE_FORMAT,
    parse_roi_text,
    read_roi_file,
    regions_for_image,
    roi_file_text,
    write_roi_file,
)
from probeplan.unmixing.shapes import RoiShape

SHAPE_YX = (24, 30)
POLY_X, POLY_Y = (3.3, 17.8, 12.1, 4.6), (2.7, 5.2, 16.9, 12.4)
ELL_CX, ELL_CY, ELL_RX, ELL_RY = 19.2, 11.3, 8.35, 6.15
REGIONS = [RoiShape("liver", "polygon", POLY_X, POLY_Y),
           RoiShape("node", "ellipse", (ELL_CX - ELL_RX, ELL_CX + ELL_RX), (ELL_CY - ELL_RY, ELL_CY + ELL_RY)),
           RoiShape("background", "rectangle", (24, 30), (18, 24))]


def _skimage_masks() -> dict[str, np.ndarray]:
    poly = np.zeros(SHAPE_YX, bool)
    rr, cc = sk_polygon(np.array(POLY_Y) - 0.5, np.array(POLY_X) - 0.5, SHAPE_YX)
    poly[rr, cc] = True
    ell = np.zeros(SHAPE_YX, bool)
    rr, cc = sk_ellipse(ELL_CY - 0.5, ELL_CX - 0.5, ELL_RY, ELL_RX, shape=SHAPE_YX)
    ell[rr, cc] = True
    bg = np.zeros(SHAPE_YX, bool)
    bg[18:24, 24:30] = True  # the text rectangle background:24,18,30,24
    return {"liver": poly, "node": ell, "background": bg}


def _maps(seed: int = 5) -> np.ndarray:
    """Two smooth, different abundance maps (our own test data)."""
    yy, xx = np.mgrid[0:SHAPE_YX[0], 0:SHAPE_YX[1]]
    rng = np.random.default_rng(seed)
    a = 100 + 40 * np.sin(xx / 4.0) * np.cos(yy / 5.0) + rng.uniform(0, 10, SHAPE_YX)
    b = 50 + 2.0 * xx + 3.0 * yy
    return np.stack([a, b])


def test_polygon_and_ellipse_means_use_the_shapes_own_pixels(tmp_path):
    path = write_roi_file(tmp_path / "rois.json", REGIONS, image_size=(30, 24), background="background")
    rois, drawn, labels = regions_for_image([str(path)], SHAPE_YX)
    assert labels is None and [d.name for d in drawn] == ["liver", "node", "background"]
    maps = _maps()
    rows = roi_statistics(maps, rois, ["a", "b"]).to_dict("records")
    ref = _skimage_masks()
    assert ref["liver"].sum() > 100 and ref["node"].sum() > 100  # big enough to matter
    for r in rows:
        m = ref[r["roi"]]
        k = ["a", "b"].index(r["component"])
        assert r["n_pixels"] == int(m.sum())
        assert r["mean"] == pytest.approx(float(maps[k][m].mean()), rel=1e-12)
        assert r["sd"] == pytest.approx(float(maps[k][m].std(ddof=1)), rel=1e-9)
    # the --roi text forms of the same ellipse select the same pixels (corner origin, centre inside)
    text = parse_roi(f"node:ellipse:{ELL_CX},{ELL_CY},{ELL_RX},{ELL_RY}").mask(SHAPE_YX)
    np.testing.assert_array_equal(text, ref["node"])
    pts = ",".join(f"{x},{y}" for x, y in zip(POLY_X, POLY_Y, strict=True))
    np.testing.assert_array_equal(parse_roi(f"liver:polygon:{pts}").mask(SHAPE_YX), ref["liver"])


def test_a_study_measures_ellipse_and_polygon_rois_from_the_file(tmp_path):
    """run_study's ROI mean (least squares of the ROI's mean spectrum) of a noise-free float stack equals the
    true abundance averaged over the scikit-image mask."""
    from probeplan.study.runs import run_study

    maps = _study_folder(tmp_path)
    (tmp_path / "study.csv").write_text("animal,group,time_h,file\nm1,a,1,m1.tif\n")
    write_roi_file(tmp_path / "rois.json", REGIONS, image_size=(30, 24), background="background")
    out = tmp_path / "out"
    r = run_study(tmp_path / "study.csv", tmp_path / "refs.csv", out_dir=out, roi_file=tmp_path / "rois.json",
                  write_maps=False)
    ref = _skimage_masks()
    m = r.measurements.set_index(["roi", "component"])
    for roi in ("liver", "node"):
        for k, comp in enumerate(("dotA", "dotB")):
            assert m.loc[(roi, comp), "mean"] == pytest.approx(float(maps[k][ref[roi]].mean()), rel=1e-5)
    # the study's own rois.json is the same format and reads back to the same pixels and background
    back = read_roi_file(out / "rois.json", image_size=(30, 24))
    assert back.background == "background"
    for a, b in zip(REGIONS, back.rois, strict=True):
        np.testing.assert_array_equal(a.mask(SHAPE_YX), b.mask(SHAPE_YX))


def test_round_trip_of_every_kind_and_the_older_forms(tmp_path):
    labels = np.zeros(SHAPE_YX, np.uint16)
    labels[2:6, 3:9] = 4
    tifffile.imwrite(tmp_path / "labels.tif", labels)
    regions = [*REGIONS, RoiShape("half", "rectangle", (2.25, 7.75), (1.5, 9.0)),
               Roi("kidney", label=4, labels_file="labels.tif")]
    path = write_roi_file(tmp_path / "r.json", regions, image_size=(30, 24), background="node", note="day 3")
    doc = json.loads(path.read_text())
    assert doc["format"] == ROI_FILE_FORMAT and doc["version"] == 2 and "top-left corner" in doc["coordinates"]
    back = read_roi_file(path)
    assert back.regions == regions and back.background == "node" and back.note == "day 3"
    assert back.image_size == (30, 24) and back.labels.shape == SHAPE_YX
    assert back.rois[-1].mask(SHAPE_YX, back.labels).sum() == 24
    # the page's first form centred pixel (i, j) on (i, j): x [5, 14] are the centres of columns 5..14
    old_page = {"kind": "probeplan ROIs", "version": 1, "rois": [
        {"name": "t", "shape": "rectangle", "x": [5, 14], "y": [2, 3]},
        {"name": "e", "shape": "ellipse", "x": [ELL_CX - ELL_RX - 0.5, ELL_CX + ELL_RX - 0.5],
         "y": [ELL_CY - ELL_RY - 0.5, ELL_CY + ELL_RY - 0.5]}]}
    f = parse_roi_text(json.dumps(old_page), source="old.json")
    np.testing.assert_array_equal(f.rois[0].mask(SHAPE_YX), parse_roi("t:5,2,15,4").mask(SHAPE_YX))
    np.testing.assert_array_equal(f.shapes[1].mask(SHAPE_YX), _skimage_masks()["node"])
    # the study's first form (same coordinates as now)
    old_study = {"format": "probeplan-rois", "version": 1, "rois": [
        {"name": "t", "shape": "rectangle", "x0": 5, "y0": 2, "x1": 15, "y1": 4},
        {"name": "e", "shape": "ellipse", "cx": ELL_CX, "cy": ELL_CY, "rx": ELL_RX, "ry": ELL_RY},
        {"name": "p", "shape": "polygon", "points": [list(p) for p in zip(POLY_X, POLY_Y, strict=True)]}]}
    g = parse_roi_text(json.dumps(old_study), source="old.json")
    assert g.rois[0].rect == (5, 2, 15, 4)
    np.testing.assert_array_equal(g.shapes[1].mask(SHAPE_YX), _skimage_masks()["node"])
    np.testing.assert_array_equal(g.shapes[2].mask(SHAPE_YX), _skimage_masks()["liver"])


def _bad_files():
    good = roi_file_text(REGIONS, image_size=(30, 24), background="background")
    return [
        ("not json {", "r.json: is not JSON"),
        ('{"rois": []}', r"r.json: format: is None, not 'probeplan-rois'"),
        (good.replace('"version": 2', '"version": 3'), r"r.json: version: 3 is not known"),
        (good.replace('"image_size": [30, 24]', '"image_size": [30]'), r"r.json: image_size: .* is not \[width"),
        (good.replace('"shape": "ellipse"', '"shape": "circle"'), r"r.json: rois\[1\]\.shape: 'circle' is not known"),
        (good.replace('"x": [24, 30]', '"x": [24, "30"]'), r"r.json: rois\[2\]\.x: .* is not a list of numbers"),
        (good.replace('"x": [24, 30]', '"x": [24]'), r"r.json: rois\[2\]\.y: has 2 values but x has 1"),
        (good.replace('"x": [3.3, 17.8, 12.1, 4.6], "y": [2.7, 5.2, 16.9, 12.4]', '"x": [3, 4], "y": [1, 2]'),
         r"r.json: rois\[0\]\.x: a polygon needs 3 or more vertices"),
        (good.replace('"name": "node"', '"name": "liver"'), r"r.json: rois: the name 'liver' is used twice"),
        (good.replace('"background": "background"', '"background": "bg"'), r"r.json: background: 'bg' is not one"),
        (good.replace('"name": "node", ', ""), r"r.json: rois\[1\]\.name: is missing"),
    ]


@pytest.mark.parametrize(("text", "message"), _bad_files())
def test_a_malformed_file_is_refused_naming_the_field(text, message):
    with pytest.raises(InputError, match=message):
        parse_roi_text(text, source="r.json")


def test_another_image_size_and_a_missing_label_image_are_refused(tmp_path):
    path = write_roi_file(tmp_path / "r.json", REGIONS, image_size=(30, 24))
    with pytest.raises(InputError, match="drawn on a 30 x 24 image, this one is 64 x 64"):
        regions_for_image([str(path)], (64, 64))
    write_roi_file(tmp_path / "l.json", [Roi("kidney", label=4, labels_file="missing.tif")])
    with pytest.raises(InputError, match="cannot be read as a label TIFF"):
        read_roi_file(tmp_path / "l.json")
    with pytest.raises(InputError, match="used twice"):
        roi_file_text([REGIONS[0], REGIONS[0]])
    with pytest.raises(InputError, match="mask, not a drawn shape"):
        roi_file_text([Roi("m", pixel_mask=np.ones((2, 2), bool))])


def _study_folder(tmp_path):
    """References and one noise-free float stack of the true maps (m1.tif); the maps."""
    refs = np.array([[0.6, 0.1], [0.3, 0.3], [0.1, 0.6]])
    channels = ["ch650", "ch700", "ch750"]
    (tmp_path / "refs.csv").write_text("channel,dotA,dotB\n" + "".join(
        f"{c},{refs[i, 0]},{refs[i, 1]}\n" for i, c in enumerate(channels)))
    maps = _maps()
    write_stack(tmp_path / "m1.tif", np.einsum("ck,kyx->cyx", refs / refs.sum(axis=0), maps).astype(np.float32),
                channel_names=channels)
    return maps


def test_the_commands_take_the_roi_file_and_refuse_a_bad_one_in_one_line(tmp_path, capsys):
    maps = _study_folder(tmp_path)
    write_roi_file(tmp_path / "rois.json", REGIONS, image_size=(30, 24), background="node")
    code = main(["unmix", str(tmp_path / "m1.tif"), "--references", str(tmp_path / "refs.csv"), "--out",
                 str(tmp_path / "a.ome.tif"), "--method", "ls", "--roi", str(tmp_path / "rois.json")])
    assert code == 0
    rows = pd.read_csv(tmp_path / "a_roi.csv", comment="#")
    ref = _skimage_masks()
    liver = rows[(rows["roi"] == "liver") & (rows["component"] == "dotA")].iloc[0]
    assert liver["mean"] == pytest.approx(float(maps[0][ref["liver"]].mean()), rel=1e-5)
    # the file's background is the default: TBR against the ellipse
    assert liver["tbr"] == pytest.approx(maps[0][ref["liver"]].mean() / maps[0][ref["node"]].mean(), rel=1e-5)
    capsys.readouterr()
    bad = tmp_path / "bad.json"
    bad.write_text(roi_file_text(REGIONS).replace('"shape": "ellipse"', '"shape": "circle"'))
    for argv in (["unmix", str(tmp_path / "m1.tif"), "--references", str(tmp_path / "refs.csv"), "--out",
                  str(tmp_path / "b.ome.tif"), "--roi", str(bad)],
                 ["study", str(tmp_path / "study.csv"), "--references", str(tmp_path / "refs.csv"), "--out",
                  str(tmp_path / "s"), "--rois", str(bad)]):
        (tmp_path / "study.csv").write_text("animal,group,time_h,file\nm1,a,1,m1.tif\n")
        assert main(argv) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and f"{bad}: rois[1].shape: 'circle' is not known" in err[0], err
        assert not (tmp_path / "b.ome.tif").exists() and not (tmp_path / "s").exists()


def test_the_study_command_takes_the_file_and_its_background(tmp_path, capsys):
    maps = _study_folder(tmp_path)
    (tmp_path / "study.csv").write_text("animal,group,time_h,file\nm1,a,1,m1.tif\n")
    write_roi_file(tmp_path / "rois.json", REGIONS, image_size=(30, 24), background="node")
    out = tmp_path / "out"
    assert main(["study", str(tmp_path / "study.csv"), "--references", str(tmp_path / "refs.csv"), "--out", str(out),
                 "--roi", str(tmp_path / "rois.json"), "--no-maps"]) == 0
    m = pd.read_csv(out / "measurements.csv", comment="#").set_index(["roi", "component"])
    ref = _skimage_masks()
    # no --roi-background: the file's background (the ellipse) is the TBR's denominator
    assert m.loc[("liver", "dotB"), "tbr"] == pytest.approx(maps[1][ref["liver"]].mean() / maps[1][ref["node"]].mean(),
                                                            rel=1e-5)
    assert read_roi_file(out / "rois.json").background == "node"
    capsys.readouterr()
    assert main(["study", str(tmp_path / "study.csv"), "--references", str(tmp_path / "refs.csv"), "--out",
                 str(tmp_path / "two"), "--roi", str(tmp_path / "rois.json"), "--rois", str(tmp_path / "rois.json")]) == 2
    assert "2 ROI files given" in capsys.readouterr().err


def test_mutated_files_parse_or_are_refused_in_one_line():
    """300 seeded mutations of a good file (values swapped for null, true, text, lists, objects, huge, negative and
    non-finite numbers; cuts): each one parses or raises InputError, never another exception."""
    rng = np.random.default_rng(11)
    good = roi_file_text([*REGIONS, Roi("kidney", label=4, labels_file="labels.tif")], image_size=(30, 24),
                         background="background")
    values = ["null", "true", '"x"', "[]", "{}", "1e400", "-1", "NaN", "0", '[1, "a"]', '{"x": 1}', "[[1, 2]]"]
    parsed = refused = 0
    for _ in range(300):
        text = good
        if rng.random() < 0.2:
            text = text[: int(rng.integers(1, len(text)))]
        else:
            tokens = [m.span() for m in re.finditer(r'-?\d+(\.\d+)?|"[^"]*"|\[[^\[\]]*\]', text)]
            for _k in range(int(rng.integers(1, 4))):
                a, b = tokens[int(rng.integers(len(tokens)))]
                text = text[:a] + values[int(rng.integers(len(values)))] + text[b:]
                tokens = [m.span() for m in re.finditer(r'-?\d+(\.\d+)?|"[^"]*"|\[[^\[\]]*\]', text)]
        try:
            parse_roi_text(text, source="m.json")
            parsed += 1
        except InputError as exc:
            assert str(exc).startswith("m.json") and "\n" not in str(exc), str(exc)
            refused += 1
    assert parsed + refused == 300 and refused > 200 and parsed > 0
