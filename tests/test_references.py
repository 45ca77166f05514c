"""Reference spectra from CSV (the documented format: a channel column, then one column per component), from control stacks, and from a matrix."""

import numpy as np
import pytest

from probeplan.errors import AssumptionWarning, InputError
from probeplan.unmixing.references import (
    normalise_columns,
    read_references_csv,
    references_from_controls,
    references_from_matrix,
    write_references_csv,
)


def _csv(tmp_path, text):
    p = tmp_path / "ref.csv"
    p.write_text(text)
    return p


def test_read_and_normalise(tmp_path):
    p = _csv(tmp_path, "# comment\nchannel,dotA,autofluorescence\nc1,1,2\nc2,3,2\n")
    r = read_references_csv(p)
    np.testing.assert_allclose(r.matrix.sum(axis=0), 1.0)
    assert r.component_names == ("dotA", "autofluorescence") and r.channel_names == ("c1", "c2")
    assert read_references_csv(p, normalise="max").matrix[:, 0].tolist() == [1 / 3, 1.0]
    assert read_references_csv(p, normalise=None).matrix[:, 0].tolist() == [1.0, 3.0]
    q = tmp_path / "out.csv"
    write_references_csv(q, r)
    np.testing.assert_allclose(read_references_csv(q, normalise=None).matrix, r.matrix, rtol=1e-15)


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("channel,a\nc1,nan\n", r"ref\.csv:2: a='nan' is NaN"),
        ("channel,a\nc1,-1\n", r"ref\.csv:2: a='-1' is NaN, infinite or negative"),
        ("channel,a\nc1,x\n", r"ref\.csv:2: a='x' is not a number"),
        ("wavelength,a\nc1,1\n", r"ref\.csv:1: first column"),
        ("channel,a,a\nc1,1,1\n", r"ref\.csv:1: component columns"),
        ("channel,a\nc1,1\nc1,2\n", r"ref\.csv:3: channel name 'c1'"),
        ("channel,a\nc1,1,2\n", r"ref\.csv:2: 3 fields"),
        ("", "no header"),
    ],
)
def test_csv_errors_name_file_and_line(tmp_path, text, match):
    with pytest.raises(InputError, match=match):
        read_references_csv(_csv(tmp_path, text))


def test_for_channels_reorders_and_refuses_mismatch(tmp_path):
    r = read_references_csv(_csv(tmp_path, "channel,a,b\nc1,1,0\nc2,0,1\nc3,1,1\n"), normalise=None)
    s = r.for_channels(["c3", "c1", "c2"])
    assert s.matrix.tolist() == [[1, 1], [1, 0], [0, 1]]
    with pytest.raises(InputError, match=r"no row for channel\(s\) \['c9'\]"):
        r.for_channels(["c1", "c2", "c9"])
    with pytest.raises(InputError, match="3 channel rows"):
        r.for_channels(["c1", "c2"])
    assert r.for_channels(None) is r


def test_from_matrix_slot_and_with_component():
    r = references_from_matrix(np.array([[1.0, 0.0], [1.0, 2.0]]), ["a", "b"], ["x", "y"])
    r2 = r.with_component("autofluorescence", [1.0, 1.0])
    assert r2.component_names == ("a", "b", "autofluorescence") and r2.matrix.shape == (2, 3)
    with pytest.raises(InputError, match="negative"):
        references_from_matrix([[1.0, -1.0]], ["a", "b"])
    with pytest.raises(InputError, match="unique"):
        references_from_matrix([[1.0, 1.0]], ["a", "a"])
    with pytest.raises(InputError, match="all zero"):
        normalise_columns([[0.0], [0.0]])


def test_from_controls_recovers_spectra():
    # synthetic controls: background + one probe's spectrum x random brightness + Poisson noise
    rng = np.random.default_rng(0)
    bg_level = np.array([50.0, 60.0, 40.0, 30.0])[:, None, None]
    spectra = {"dotA": np.array([0.6, 0.3, 0.1, 0.0]), "dotB": np.array([0.05, 0.15, 0.4, 0.4])}
    unlabelled = rng.poisson(np.broadcast_to(bg_level, (4, 60, 60))).astype(float)
    controls = {}
    for name, s in spectra.items():
        bright = np.zeros((60, 60))
        bright[20:40, 20:40] = 5000.0
        controls[name] = rng.poisson(bg_level + s[:, None, None] * bright).astype(float)
    r = references_from_controls(controls, unlabelled)
    for k, s in enumerate(spectra.values()):
        np.testing.assert_allclose(r.matrix[:, k], s / s.sum(), atol=0.01)
    mask = np.zeros((60, 60), bool)
    mask[25:35, 25:35] = True
    r2 = references_from_controls(controls, unlabelled, roi=mask)
    np.testing.assert_allclose(r2.matrix, r.matrix, atol=0.01)
    odd = unlabelled.copy()
    odd[0] -= 20.0  # a background mismatch in channel 0
    odd[1] += 1000.0
    with pytest.warns(AssumptionWarning, match=r"below background in channel\(s\) \[0"):
        r3 = references_from_controls({"odd": odd}, unlabelled, roi=mask)
    assert r3.matrix[0, 0] == 0.0
    with pytest.raises(InputError, match="no signal above the unlabelled control"):
        references_from_controls({"dim": unlabelled - 5.0}, unlabelled, roi=mask)
    with pytest.raises(InputError, match="channels"):
        references_from_controls({"x": np.ones((3, 4, 4))}, unlabelled)
