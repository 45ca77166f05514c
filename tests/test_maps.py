"""Maps you can read: the colour-blind-safe palette, the composite, small multiples, drawn regions, the ROI file,
and the number formatting of figures and tables."""

from __future__ import annotations

import math

import numpy as np
import pytest

from probeplan.errors import InputError
from probeplan.report.document import format_number
from probeplan.unmixing import overlay
from probeplan.unmixing.roifile import parse_roi_text, read_roi_file, roi_file_text, write_roi_file
from probeplan.unmixing.shapes import (
    RoiShape,
    shape_from_selection,
    shapes_to_rois,
    suggest_target_roi,
)

# --------------------------------------------------------------------------- palette and composite

#: Okabe & Ito, "Color Universal Design" (2008), the 8-bit RGB values of their set; the same in
#: Wong, Nat. Methods 8, 441 (2011), Fig. 2.
PUBLISHED_OKABE_ITO = {
    "orange": (230, 159, 0), "sky blue": (86, 180, 233), "bluish green": (0, 158, 115), "yellow": (240, 228, 66),
    "blue": (0, 114, 178), "vermilion": (213, 94, 0), "reddish purple": (204, 121, 167), "black": (0, 0, 0),
}


def test_palettes_are_the_published_okabe_ito_colours():
    assert overlay.OKABE_ITO == PUBLISHED_OKABE_ITO
    published = {tuple(c / 255 for c in rgb) for rgb in PUBLISHED_OKABE_ITO.values()}
    assert all(tuple(c) in published for c in overlay.PALETTE)
    assert len(set(overlay.PALETTE)) == len(overlay.PALETTE)
    from probeplan.report.figures import PALETTE as LINE_PALETTE

    hexes = {"#%02X%02X%02X" % rgb for rgb in PUBLISHED_OKABE_ITO.values()}
    assert set(LINE_PALETTE) <= hexes and len(set(LINE_PALETTE)) == len(LINE_PALETTE)


def test_composite_keeps_each_hue_where_components_overlap():
    # two components, each at full brightness in its own half and together in the middle
    a = np.zeros((2, 1, 3))
    a[0, 0, :2] = 1.0
    a[1, 0, 1:] = 1.0
    rgb = overlay.composite_rgb(a, limits=[1.0, 1.0])
    assert np.allclose(rgb[0, 0], overlay.PALETTE[0]) and np.allclose(rgb[0, 2], overlay.PALETTE[1])
    # overlap: the per-channel maximum of the two colours, never the white an additive mix gives
    assert np.allclose(rgb[0, 1], np.maximum(overlay.PALETTE[0], overlay.PALETTE[1]))
    assert not np.allclose(rgb[0, 1], 1.0)


def test_composite_contrast_control_scales_one_component_only():
    a = np.ones((2, 4, 4))
    full = overlay.composite_rgb(a, limits=[1.0, 1.0], colours=[(1, 0, 0), (0, 1, 0)])
    dim = overlay.composite_rgb(a, limits=[4.0, 1.0], colours=[(1, 0, 0), (0, 1, 0)])
    assert np.allclose(full[..., 0], 1.0) and np.allclose(dim[..., 0], 0.25)
    assert np.allclose(dim[..., 1], full[..., 1])
    hidden = overlay.composite_rgb(a, limits=[0.0, 1.0], colours=[(1, 0, 0), (0, 1, 0)])
    assert np.allclose(hidden[..., 0], 0.0)


def test_scale_bar_lengths_are_round_numbers_near_a_fifth_of_the_width():
    for width in (3.3, 640.0, 999.0, 12_800.0, 1e5):
        length = overlay.scale_bar_length_um(width)
        mantissa = length / 10 ** math.floor(math.log10(length))
        assert round(mantissa, 9) in (1.0, 2.0, 5.0)
        assert width / 12.5 <= length <= width / 5.0 + 1e-9
    with pytest.raises(InputError, match="pixel size"):
        overlay.scale_bar_length_um(float("nan"))


def _texts(fig) -> list[str]:
    fig.canvas.draw()
    out = [t.get_text() for t in fig.findobj(lambda a: hasattr(a, "get_text"))]
    return [t for t in out if t]


def test_maps_figure_has_a_colour_bar_per_map_with_its_unit_a_scale_bar_and_the_regions():
    maps = np.random.default_rng(1).random((3, 40, 60))
    rois = [RoiShape("tumour", "ellipse", (10, 20), (10, 20))]
    fig = overlay.maps_figure(maps, ["a", "b", "c"], ["µM", "µM", "counts"], pixel_size_um=(50.0, 50.0), rois=rois)
    texts = _texts(fig)
    colour_bars = [ax for ax in fig.axes if ax.get_label() == "<colorbar>"]
    assert len(colour_bars) == 3
    assert sorted(cb.get_ylabel() for cb in colour_bars) == ["counts", "µM", "µM"]
    # 60 px x 50 µm = 3 mm wide: a 0.5 mm bar
    assert "500 µm" in texts
    assert texts.count("tumour") == 3
    no_size = _texts(overlay.maps_figure(maps[:1], ["a"], "counts"))
    assert "x (pixel)" in no_size and not any(t.endswith("µm") or t.endswith(" mm") for t in no_size)


def test_overlay_png_of_the_command_line_has_composite_and_maps(tmp_path):
    import matplotlib.image as mpimg

    a = np.random.default_rng(2).random((2, 30, 40))
    path = overlay.write_overlay_png(tmp_path / "o.png", a, ["dot A", "dot B"], pixel_size_um=(10.0, 10.0),
                                     rois=[RoiShape("t", "rectangle", (2, 9), (2, 9))])
    img = mpimg.imread(path)
    assert img.shape[1] > img.shape[0]  # composite beside the maps


# --------------------------------------------------------------------------- drawn regions and the ROI file


def test_ellipse_and_polygon_masks_match_their_areas():
    # ellipse area pi*a*b (a = 20, b = 12 pixels): pixel-centre counting is within 2 % at this size
    e = RoiShape("e", "ellipse", (10, 50), (10, 34)).mask((60, 80))
    assert e.sum() == pytest.approx(math.pi * 20 * 12, rel=0.02)
    # triangle with its corners on pixel centres (i + 0.5): shoelace area 600; counting centres with edges
    # included adds half the boundary (Pick's theorem: I + B = A + B/2 + 1, with B = 40 + 30 + 10 = 80
    # centres on the edges)
    t = RoiShape("t", "polygon", (0.5, 40.5, 0.5), (0.5, 0.5, 30.5)).mask((40, 50))
    assert t.sum() == 600 + 80 / 2 + 1
    # corners (2, 1) and (6, 4): columns 2-5, rows 1-3, as the text rectangle r:2,1,6,4
    r = RoiShape("r", "rectangle", (2, 6), (1, 4)).mask((10, 10))
    assert r.sum() == 4 * 3 and r[1, 2] and r[3, 5] and not r[4, 5] and not r[1, 6]


def test_regions_measure_through_the_roi_statistics():
    from probeplan.unmixing.roi import roi_statistics

    a = np.full((1, 20, 20), 10.0)
    a[0, 5:10, 5:10] = 50.0
    rois = shapes_to_rois([RoiShape("spot", "rectangle", (5, 10), (5, 10)),
                           RoiShape("background", "polygon", (12, 20, 20, 12), (12, 12, 20, 20))], (20, 20))
    rows = roi_statistics(a, rois, ["dot"]).to_dict("records")
    assert rows[0]["n_pixels"] == 25 and rows[0]["mean"] == 50.0 and rows[0]["tbr"] == 5.0
    with pytest.raises(InputError, match="holds no pixel"):
        shapes_to_rois([RoiShape("far", "rectangle", (40, 50), (40, 50))], (20, 20))
    with pytest.raises(InputError, match="used twice"):
        shapes_to_rois([RoiShape("x", "rectangle", (1, 2), (1, 2))] * 2, (20, 20))


def test_roi_file_round_trip_and_refusals(tmp_path):
    shapes = [RoiShape("tumour", "ellipse", (20.5, 44), (18, 40)),
              RoiShape("liver", "polygon", (60, 80, 75), (50, 52, 70)),
              RoiShape("background", "rectangle", (100, 127), (0, 15))]
    path = write_roi_file(tmp_path / "r.json", shapes, image_size=(128, 96), background="background")
    back = read_roi_file(path, image_size=(128, 96))
    assert back.regions == shapes and back.background == "background" and back.image_size == (128, 96)
    with pytest.raises(InputError, match="drawn on a 128 x 96 image"):
        read_roi_file(path, image_size=(64, 64))
    text = roi_file_text(shapes)
    for bad, message in [
        ("{", "not JSON"),
        ("[]", "not an ROI file"),
        (text.replace('"version": 2', '"version": 9'), r"version: 9 is not known"),
        (text.replace('"ellipse"', '"star"'), r"rois\[0\]\.shape: 'star' is not known"),
        (text.replace('"x": [60, 80, 75]', '"x": [60, 80]'), r"rois\[1\]\.y: has 3 values but x has 2"),
        (text.replace('"name": "liver", ', ""), r"rois\[1\]\.name: is missing"),
        (text.replace("[100, 127]", '["a", 127]'), r"rois\[2\]\.x: .* is not a list of numbers"),
    ]:
        with pytest.raises(InputError, match=message):
            parse_roi_text(bad, source="r.json")


def test_chart_selection_becomes_a_region():
    box = {"box": [{"x": [10.0, 2.0], "y": [3.0, 8.0]}], "lasso": []}
    # chart pixel i is centred on i and covers image pixels 2i, 2i + 1: corners at (i + 0.5) * 2
    assert shape_from_selection(box, "a", scale=2.0) == RoiShape("a", "rectangle", (5.0, 21.0), (7.0, 17.0))
    lasso = {"box": [], "lasso": [{"x": [1, 5, 3], "y": [1, 1, 4]}]}
    assert shape_from_selection(lasso, "b").shape == "polygon"
    with pytest.raises(InputError, match="nothing is selected"):
        shape_from_selection({"box": [], "lasso": []}, "c")


def test_automatic_target_region_is_the_half_maximum_spot():
    yy, xx = np.mgrid[0:64, 0:64]
    sigma = 4.0
    spot = np.exp(-((xx - 40) ** 2 + (yy - 22) ** 2) / (2 * sigma**2))
    roi = suggest_target_roi(spot + 0.01 * np.random.default_rng(3).random(spot.shape), smooth_px=0.0)
    # a Gaussian's half-maximum contour is a circle of radius sigma*sqrt(2 ln 2) (its FWHM / 2)
    r = sigma * math.sqrt(2 * math.log(2))
    n = int(roi.mask(spot.shape).sum())
    assert n == pytest.approx(math.pi * r**2, rel=0.15)
    assert suggest_target_roi(np.ones((8, 8))) is None


# --------------------------------------------------------------------------- numbers in tables and figures


@pytest.mark.parametrize(("value", "digits", "text"), [
    (2.4000000000000004, 4, "2.4"), (0.0046, 2, "0.0046"), (1500.0, 3, "1500"), (0.0, 3, "0"),
    (1.5e6, 4, "1.500e+06"), (float("nan"), 3, "–"), (None, 3, "–"), (-0.25, 3, "-0.25"),
])
def test_format_number(value, digits, text):
    assert format_number(value, digits) == text


def test_crosstalk_annotation_keeps_small_values_and_sbr_axis_is_linear():
    from probeplan.report.figures import crosstalk_figure

    fig = crosstalk_figure(np.array([[1.0, 0.0046], [0.12, 1.0]]), ["p1", "p2"], ["c1", "c2"])
    texts = _texts(fig)
    assert "0.0046" in texts and "0.00" not in texts


def test_filter_labels_sit_above_the_emission_curves():
    from probeplan.report.figures import spectra_figure

    wl = np.arange(600.0, 900.0, 1.0)
    gauss = [np.exp(-0.5 * ((wl - c) / 15.0) ** 2) for c in (700, 720, 800)]
    filt = [((wl > c - 15) & (wl < c + 15)).astype(float) for c in (700, 720, 800)]
    fig = spectra_figure(wl, [("a", gauss[0]), ("b", gauss[1]), ("c", gauss[2])],
                         [("700/30", filt[0]), ("720/30", filt[1]), ("800/30", filt[2])])
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    ax = fig.axes[0]
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    labels = [t for t in ax.texts if t.get_text().endswith("/30")]
    assert len(labels) == 3
    assert all(t.get_position()[1] > 1.0 for t in labels)  # above every peak (peaks are 1)
    boxes = [t.get_window_extent(renderer) for t in labels]
    assert not any(boxes[i].overlaps(boxes[j]) for i in range(3) for j in range(i + 1, 3))


def test_a_drag_past_the_image_edge_stops_at_the_edge():
    box = {"box": [{"x": [120.0, 140.0], "y": [-5.0, 10.0]}], "lasso": []}
    shape = shape_from_selection(box, "corner", image_size=(128, 96))
    assert shape.x == (120.5, 128.0) and shape.y == (0.0, 10.5)
    # a chart drawn with the corner origin (the page's) needs no half-pixel shift
    shape = shape_from_selection(box, "corner", image_size=(128, 96), offset=0.0)
    assert shape.x == (120.0, 128.0) and shape.y == (0.0, 10.0)


def test_a_drawn_rectangle_has_the_text_form_with_the_same_pixels():
    from probeplan.unmixing.roi import parse_rectangle

    from probeplan.unmixing.shapes import rectangle_spec

    shape = RoiShape("t", "rectangle", (2.4, 9.6), (3.0, 7.0))
    spec = rectangle_spec(shape)
    x0, y0, x1, y1 = parse_rectangle(spec).rect
    m = np.zeros((12, 12), bool)
    m[y0:y1, x0:x1] = True
    assert (m == shape.mask((12, 12))).all()
    with pytest.raises(InputError, match="draw it as a rectangle"):
        rectangle_spec(RoiShape("e", "ellipse", (1, 5), (1, 5)))
