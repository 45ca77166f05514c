"""Depth from the spectrum: recovery on synthetic images over 1-6 mm, refusal, sensitivity, the command."""

import json
import warnings

import numpy as np
import pytest
import tifffile

from probeplan.cli.main import main
from probeplan.demo import demo_folder
from probeplan.errors import AssumptionWarning, InputError
from probeplan.study.depth_spectrum import (
    DEFAULT_DEPTH_GRID_MM,
    channel_depth_curves,
    depth_from_spectrum,
    depth_from_spectrum_plan,
)
from probeplan.study.evaluate import plan_model
from probeplan.study.plan import load_plan, parse_plan_text

# An invented NIR-II set-up: one PbS probe at 1350 nm read at 1250, 1350 and 1450 nm (the 1450 nm water band
# reshapes the escaping spectrum with depth), 808 nm excitation, InGaAs camera.
_PROBE = """[[probes]]
name = "probe N (1350)"
material = "PbS"
emission_peak_nm = 1350
stock_uM = 10.0
dose_nmol_per_kg = 8
route = "iv"
injection_time_h = 0

"""
_CHANNELS = "".join(f'[[acquisition.channels]]\nname = "{c}"\nfilter = "{c}/50"\nexposure_s = 0.05\n\n'
                    for c in ("1250", "1350", "1450"))


def _nir2_plan():
    text = (demo_folder() / "plan.toml").read_text()
    head, rest = text[: text.index("[[probes]]")], text[text.index("[target]"): text.index("[[acquisition.channels]]")]
    rest = rest.replace('camera = "si-deep-depletion"', 'camera = "ingaas"').replace("wavelength_nm = 640",
                                                                                      "wavelength_nm = 808")
    return parse_plan_text(head + _PROBE + rest + _CHANNELS, source="nir2.toml")


@pytest.fixture(scope="module")
def nir2():
    plan = _nir2_plan()
    m = plan_model(plan)
    curves = channel_depth_curves(m.tissue, m.probes[0], m.channels, source=m.source,
                                  irradiance_mw_per_cm2=m.irradiance_mw_per_cm2, camera=m.camera, lens=m.lens,
                                  target_size_mm=plan.target["size_mm"])
    return plan, curves, [c.name for c in m.channels]


def _image(curves, depth_mm, rng, *, peak_counts=5000.0, background=200.0, shape=(20, 20)):
    # The probe's concentration is set so that its brightest channel holds ``peak_counts``: the check is of the
    # inversion at a usable signal, not of how deep a fixed dose can still be seen (NIR-II absorption by blood and
    # water leaves a 0.01 uM target only a few counts per pixel beyond 3 mm).
    i = int(np.argmin(np.abs(DEFAULT_DEPTH_GRID_MM - depth_mm)))
    mean = curves[i] * (peak_counts / float(np.max(curves[i])))
    counts = rng.poisson(mean[:, None, None] + background, size=(3, *shape)).astype(float) - background
    se = np.sqrt(mean + background)[:, None, None] * np.ones((1, *shape))
    return counts, se


@pytest.mark.parametrize("depth_mm", [1.0, 2.0, 3.0, 4.0, 5.0, 6.0])
def test_recovers_known_depth_on_synthetic_images(nir2, depth_mm):
    # synthetic images from the forward model with Poisson noise: 400 pixels at a known depth
    _, curves, names = nir2
    counts, se = _image(curves, depth_mm, np.random.default_rng(int(depth_mm)))
    est = depth_from_spectrum(counts, curves, channel_names=names, signal_se=se)
    assert est.depth_mm.shape == (20, 20)
    # the ROI's mean spectrum (400 pixels) recovers the depth; each pixel's interval covers it (below)
    roi = depth_from_spectrum(counts.mean(axis=(1, 2)), curves, channel_names=names,
                              signal_se=se[:, 0, 0] / np.sqrt(counts[0].size))
    assert float(roi.depth_mm) == pytest.approx(depth_mm, abs=0.1)
    assert float(roi.ci_low_mm) <= depth_mm <= float(roi.ci_high_mm)
    covered = np.mean((est.ci_low_mm <= depth_mm) & (est.ci_high_mm >= depth_mm))
    assert 0.85 <= covered <= 1.0  # 95 % intervals (profile likelihood) cover the truth about 95 % of the time
    assert est.channel_pair == ("1250", "1350")


def test_sensitivity_predicts_the_shift_of_a_ratio_change(nir2):
    _, curves, names = nir2
    pair = curves[:, :2]  # the two channels of the reported ratio, 1250 and 1350 nm
    i = int(np.argmin(np.abs(DEFAULT_DEPTH_GRID_MM - 3.0)))
    clean = pair[i] * 0.01
    base = depth_from_spectrum(clean, pair, channel_names=names[:2])
    shifted = clean.copy()
    shifted[0] *= 1.05  # the 1250/1350 ratio up by 5 %
    moved = depth_from_spectrum(shifted, pair, channel_names=names[:2])
    expected = 5 * float(base.sensitivity_mm_per_percent)
    assert abs(float(moved.depth_mm) - float(base.depth_mm)) == pytest.approx(expected, rel=0.25)
    assert float(base.depth_mm) == pytest.approx(3.0, abs=0.05)


def test_refuses_channels_that_cannot_tell_depths_apart():
    plan = load_plan(demo_folder() / "plan.toml")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AssumptionWarning)
        with pytest.raises(InputError, match="cannot tell depths apart"):
            depth_from_spectrum_plan(np.ones(4), plan, "probe B (780)")
    with pytest.raises(InputError, match="two or more channels"):
        depth_from_spectrum(np.ones(1), np.ones((DEFAULT_DEPTH_GRID_MM.size, 1)), channel_names=["a"])


def test_warns_when_the_emission_spectrum_is_typical(nir2):
    plan, curves, names = nir2
    with pytest.warns(AssumptionWarning, match="typical shape"):
        est = depth_from_spectrum_plan(curves[55] * 0.01, plan, "probe N (1350)")
    assert float(est.depth_mm) == pytest.approx(DEFAULT_DEPTH_GRID_MM[55], abs=0.05)


def _target_at_4mm(tmp_path, curves, names, *, seed):
    """An OME-TIFF of Poisson background (200 counts) with a 20 x 20 target at 4 mm in rows and columns
    10:30, at a usable signal in the brightest channel (see _image); its path."""
    rng = np.random.default_rng(seed)
    stack = rng.poisson(200.0, size=(3, 40, 60)).astype(np.float32)
    i = int(np.argmin(np.abs(DEFAULT_DEPTH_GRID_MM - 4.0)))
    level = 5000.0 / float(np.max(curves[i]))
    stack[:, 10:30, 10:30] += rng.poisson(curves[i][:, None, None] * level, size=(3, 20, 20))
    f = tmp_path / "stack.ome.tif"
    tifffile.imwrite(f, stack, ome=True, photometric="minisblack", metadata={"axes": "CYX", "Channel": {"Name": names}})
    return f


def test_command_per_roi_and_map(tmp_path, capsys, nir2):
    plan, curves, names = nir2
    (tmp_path / "plan.toml").write_text(plan.text)
    f = _target_at_4mm(tmp_path, curves, names, seed=7)
    out = tmp_path / "depth"
    assert main(["depth-from-spectrum", str(f), "--plan", str(tmp_path / "plan.toml"), "--probe", "probe N (1350)",
                 "--roi", "target:10,10,30,30", "--roi", "background:40,0,60,40", "--out", str(out), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    row = next(r for r in report["rois"] if r["roi"] == "target")
    assert row["depth_mm"] == pytest.approx(4.0, abs=0.15)
    assert row["ci_low_mm"] <= 4.0 <= row["ci_high_mm"]
    assert row["sensitivity_mm_per_percent"] > 0
    assert any("typical shape" in n for n in report["notes"])
    assert (out / "depth_map.ome.tif").is_file() and (out / "depth_rois.csv").is_file()
    demo = demo_folder()
    assert main(["depth-from-spectrum", str(demo / "control_2.tif"), "--plan", str(demo / "plan.toml"), "--probe",
                 "probe B (780)", "--roi", "background:2,100,20,126", "--out", str(tmp_path / "d2")]) == 2
    assert "cannot tell depths apart" in capsys.readouterr().err
    assert not (tmp_path / "d2").exists()


def test_command_takes_drawn_shapes_and_roi_files(tmp_path, capsys, nir2):
    # the same synthetic target at 4 mm measured through an ellipse and through a polygon from an ROI file:
    # both recover the depth, and each region's pixel count is the scikit-image count of its shape
    from skimage.draw import ellipse as sk_ellipse

    from probeplan.unmixing.roifile import write_roi_file
    from probeplan.unmixing.shapes import RoiShape

    plan, curves, names = nir2
    (tmp_path / "plan.toml").write_text(plan.text)
    f = _target_at_4mm(tmp_path, curves, names, seed=11)
    rois = tmp_path / "rois.json"
    write_roi_file(rois, [RoiShape("wedge", "polygon", (12.0, 28.0, 12.0), (12.0, 12.0, 28.0)),
                          RoiShape("background", "rectangle", (40.0, 60.0), (0.0, 40.0))])
    out = tmp_path / "depth"
    assert main(["depth-from-spectrum", str(f), "--plan", str(tmp_path / "plan.toml"), "--probe", "probe N (1350)",
                 "--roi", "disc:ellipse:20,20,8,8", "--roi", str(rois), "--out", str(out), "--json"]) == 0
    rows = {r["roi"]: r for r in json.loads(capsys.readouterr().out)["rois"]}
    assert set(rows) == {"disc", "wedge"}
    for row in rows.values():
        assert row["depth_mm"] == pytest.approx(4.0, abs=0.2)
        assert row["ci_low_mm"] <= 4.0 <= row["ci_high_mm"]
    # pixel centres (i + 0.5, j + 0.5) inside the ellipse of centre (20, 20), radii 8: scikit-image's rule
    # puts pixel (r, c) inside when ((r - 19.5)/8)^2 + ((c - 19.5)/8)^2 < 1
    rr, _cc = sk_ellipse(19.5, 19.5, 8, 8, shape=(40, 60))
    assert abs(rows["disc"]["pixels"] - rr.size) <= 4  # the two rules differ only on the edge
