"""Structured fuzzing of every file parser: each input either parses or is refused with InputError.

Valid files (the demo files in ``demo_tissue/`` and small tables built here) are mutated the way
real files go wrong: lines dropped, repeated or shuffled, numbers replaced by text, NaN,
negatives or huge values, units changed (µm wavelengths, percent transmission, mg/kg doses),
bytes flipped, files cut short.  Whatever comes out, the parser must either return a valid
result (checked against the parser's own promises) or raise
:class:`probeplan.errors.InputError` — never another exception and never a hang (sizes are
bounded).  Outcomes are recorded with ``hypothesis.event`` (shown by
``pytest --hypothesis-show-statistics``) and in ``OUTCOMES`` (printed with ``-s``).
"""

from __future__ import annotations

import math
import random
import tempfile
from collections import Counter, defaultdict
from pathlib import Path

import numpy as np
import pytest
import tifffile
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from probeplan.errors import InputError
from probeplan.io.stacks import read_stack, write_stack
from probeplan.model.optics import read_filter_csv
from probeplan.study.plan import parse_plan_text
from probeplan.unmixing.references import read_references_csv
from probeplan.study.rules import parse_rules_text
from probeplan.model.spectra import MAX_WAVELENGTH_NM, MIN_WAVELENGTH_NM, parse_spectra_text, read_spectra_csv

DEMO = Path(__file__).resolve().parents[1] / "demo_tissue"
#: Examples per test: enough to reach every refusal branch, small enough for ~1-2 s per test.
FAST = settings(max_examples=250, deadline=5000, suppress_health_check=[HealthCheck.function_scoped_fixture])
SLOW = settings(max_examples=120, deadline=5000, suppress_health_check=[HealthCheck.function_scoped_fixture])

#: Outcome counts per test (parsed / refused), for the hardening table in DEVELOPERS.md.
OUTCOMES: dict[str, Counter] = defaultdict(Counter)


@pytest.fixture(scope="module", autouse=True)
def _print_outcomes():
    yield
    for name, counts in sorted(OUTCOMES.items()):
        print(f"\n[fuzz] {name}: {sum(counts.values())} cases: " + ", ".join(f"{k} {v}" for k, v in sorted(counts.items())))


def _record(test: str, outcome: str) -> None:
    OUTCOMES[test][outcome] += 1
    event(outcome)


def _attempt(test: str, func, *args, **kwargs):
    """Call the parser; return its result, or None after an InputError. Any other exception fails the test."""
    try:
        result = func(*args, **kwargs)
    except InputError as exc:
        text = str(exc)
        assert text and "\n" not in text.strip(), f"refusal is not one line: {text!r}"
        assert ";" in text, f"refusal does not say where/problem; fix: {text!r}"
        _record(test, "refused (InputError)")
        return None
    _record(test, "parsed")
    return result


# --------------------------------------------------------------------------- mutations of text files

#: Replacements for a number: text, NaN/inf, negatives, huge and tiny values, other notations.
BAD_NUMBERS = ["nan", "NaN", "inf", "-inf", "-1", "-0.5", "1e309", "-1e308", "1e-320", "abc", "", " ", "1,5",
               "0x1F", "1_0", "12%", "3 nm", "٣", "1e", "--2", "0", "99999999999999999999999999"]


def _mutate_lines(lines: list[str], ops: list[tuple[str, int, int]]) -> list[str]:
    lines = list(lines)
    for op, i, j in ops:
        if not lines:
            break
        i %= len(lines)
        if op == "drop":
            del lines[i]
        elif op == "dup":
            lines.insert(i, lines[i])
        elif op == "swap":
            j %= len(lines)
            lines[i], lines[j] = lines[j], lines[i]
        elif op == "cut":
            lines[i] = lines[i][: j % (len(lines[i]) + 1)]
            del lines[i + 1:]
    return lines


_LINE_OPS = st.lists(st.tuples(st.sampled_from(["drop", "dup", "swap", "cut"]), st.integers(0, 10_000),
                               st.integers(0, 10_000)), max_size=4)


def _replace_cell(text: str, delimiter: str, index: int, new: str) -> str:
    cells = [(r, c) for r, line in enumerate(text.split("\n")) for c, _ in enumerate(line.split(delimiter))]
    if not cells:
        return text
    r, c = cells[index % len(cells)]
    rows = text.split("\n")
    parts = rows[r].split(delimiter)
    parts[c] = new
    rows[r] = delimiter.join(parts)
    return "\n".join(rows)


def _spectra_table(rng: random.Random, n_rows: int, n_cols: int, lo: float, step: float, od: bool = False) -> str:
    header = ["wavelength_nm"] + [("OD" if od and k == 0 else f"s{k}") for k in range(n_cols)]
    lines = ["# generated table for fuzzing", ",".join(header)]
    for r in range(n_rows):
        values = [rng.uniform(0, 6 if od and k == 0 else 1) for k in range(n_cols)]
        lines.append(",".join([f"{lo + r * step:g}"] + [f"{v:.4g}" for v in values]))
    return "\n".join(lines) + "\n"


@st.composite
def spectra_texts(draw, od: bool = False):
    rng = random.Random(draw(st.integers(0, 2**32 - 1)))
    text = _spectra_table(rng, draw(st.integers(2, 12)), draw(st.integers(1, 3)),
                          draw(st.sampled_from([400.0, 650.0, 900.0])), draw(st.sampled_from([1.0, 5.0, 10.0])), od)
    lines = _mutate_lines(text.split("\n"), draw(_LINE_OPS))
    text = "\n".join(lines)
    for _ in range(draw(st.integers(0, 3))):
        text = _replace_cell(text, ",", draw(st.integers(0, 500)), draw(st.sampled_from(BAD_NUMBERS)))
    unit = draw(st.sampled_from(["keep", "um-header", "um-values", "cm-unit", "percent", "tsv", "semicolon", "bom",
                                 "crlf", "random-line"]))
    if unit == "um-header":
        text = text.replace("wavelength_nm", draw(st.sampled_from(["wavelength_um", "wavelength (µm)", "wavelength [um]"])))
    elif unit == "um-values":  # wavelengths converted to µm but the header still says nm
        out = []
        for line in text.split("\n"):
            head, sep, rest = line.partition(",")
            try:
                out.append(f"{float(head) / 1000:g}{sep}{rest}")
            except ValueError:
                out.append(line)
        text = "\n".join(out)
    elif unit == "cm-unit":
        text = text.replace("wavelength_nm", "wavelength (cm)")
    elif unit == "percent":  # transmission in percent with a '%' unit in the header
        text = text.replace(",s0", ",s0 [%]")
    elif unit == "tsv":
        text = text.replace(",", "\t")
    elif unit == "semicolon":
        text = text.replace(",", ";")
    elif unit == "bom":
        text = "\ufeff" + text
    elif unit == "crlf":
        text = text.replace("\n", "\r\n")
    elif unit == "random-line":
        i = draw(st.integers(0, 50))
        rows = text.split("\n")
        rows.insert(i % (len(rows) + 1), draw(st.text(max_size=40)))
        text = "\n".join(rows)
    return text


def _check_spectra(result, kind: str) -> None:
    assert result, "parsed to nothing"
    for spectrum in result.values():
        wl = spectrum.wavelength_nm
        assert wl.size >= 2 and np.all(np.diff(wl) > 0)
        assert MIN_WAVELENGTH_NM <= wl[0] and wl[-1] <= MAX_WAVELENGTH_NM
        assert np.isfinite(spectrum.values).all()
        if kind == "emission":
            assert (spectrum.values >= 0).all()


@FAST
@given(text=spectra_texts(), kind=st.sampled_from(["emission", "other"]))
def test_fuzz_spectra_csv_mutations(text, kind):
    result = _attempt("spectra CSV (mutated text)", parse_spectra_text, text, source="fuzz.csv", kind=kind)
    if result is not None:
        _check_spectra(result, kind)


@FAST
@given(data=st.binary(max_size=300))
def test_fuzz_spectra_csv_random_bytes(tmp_path, data):
    path = tmp_path / "spectra.csv"
    path.write_bytes(data)
    result = _attempt("spectra CSV (random bytes)", read_spectra_csv, path, kind="emission")
    if result is not None:
        _check_spectra(result, "emission")


@FAST
@given(text=spectra_texts(od=False) | spectra_texts(od=True), scale=st.sampled_from([1.0, 1.0, 100.0]))
def test_fuzz_filter_csv(tmp_path, text, scale):
    if scale != 1.0:  # the same table in percent, without saying so
        text = "\n".join(
            line if not line[:1].isdigit() else ",".join([line.split(",")[0]] + [
                (f"{float(c) * scale:g}" if c.replace(".", "", 1).isdigit() else c) for c in line.split(",")[1:]])
            for line in text.split("\n"))
    path = tmp_path / "filters.csv"
    path.write_text(text, encoding="utf-8")
    result = _attempt("filter CSV", read_filter_csv, path)
    if result is not None:
        for filt in result.values():
            t = filt.transmission(filt.spectrum.wavelength_nm)
            assert np.all((t >= 0) & (t <= 1)), f"transmission outside 0-1 in {filt.name}"


@st.composite
def reference_texts(draw):
    text = (DEMO / "references.csv").read_text(encoding="utf-8")
    lines = _mutate_lines(text.rstrip("\n").split("\n"), draw(_LINE_OPS))
    text = "\n".join(lines) + "\n"
    for _ in range(draw(st.integers(0, 3))):
        text = _replace_cell(text, ",", draw(st.integers(0, 500)), draw(st.sampled_from(BAD_NUMBERS + ["665", "ch"])))
    variant = draw(st.sampled_from(["keep", "no-channel-col", "dup-col", "um-channels", "quote", "comment", "blank"]))
    if variant == "no-channel-col":
        text = text.replace("channel,", "wavelength_nm,", 1)
    elif variant == "dup-col":
        text = text.replace("probe B (780)", "probe A (700)", 1)
    elif variant == "um-channels":  # channel names in µm: they no longer name the stack's channels
        for nm in ("665", "700", "780", "880"):
            text = text.replace(f"\n{nm},", f"\n{int(nm) / 1000:g},")
    elif variant == "quote":
        text = text.replace(",", ',"', 1)
    elif variant == "comment":
        text = "# measured on an invented system\n" + text
    elif variant == "blank":
        text = text.replace("\n", "\n\n", 2)
    return text


@FAST
@given(text=reference_texts())
def test_fuzz_references_csv(tmp_path, text):
    path = tmp_path / "references.csv"
    path.write_text(text, encoding="utf-8")
    refs = _attempt("reference-spectra CSV", read_references_csv, path)
    if refs is not None:
        m = refs.matrix
        assert m.shape == (len(refs.channel_names), len(refs.component_names))
        assert np.isfinite(m).all() and (m >= 0).all()
        np.testing.assert_allclose(m.sum(axis=0), 1.0)  # the default "sum" normalisation
        assert len(set(refs.component_names)) == len(refs.component_names)
        assert len(set(refs.channel_names)) == len(refs.channel_names)


# --------------------------------------------------------------------------- TOML: plan and rules

TOML_VALUES = ["nan", "inf", "-inf", "-1", "-0.5", "0", "1e400", "1e300", "99999999999999999999999",
               "9" * 5000, '"ten"', '""', "true", "[]", "[1, 2, 3]", "{}", "{ value = 1 }", "1979-05-27", "0x10",
               "3.0e-320", "'mouse'", '"rat"', "[18.0]", "[30.0, 20.0]", '"mL"', '"mL/kg"', "12", "0.5"]
UNIT_SWAPS = [("_nmol_per_kg", "_mg_per_kg"), ("_nmol_per_kg", "_umol_per_kg"), ("depth_mm", "depth_cm"),
              ("_uM", "_nM"), ("_mw_per_cm2", "_w_per_cm2"), ("_nm", "_um"), ("body_mass_g", "body_mass_kg"),
              ("exposure_s", "exposure_ms"), ('"mL/kg"', '"mL"'), ('"min"', '"h"'), ('"count"', '"1"'),
              ('"nmol/kg"', '"mg/kg"'), ('"mm"', '"cm"')]


def _toml_mutant(draw, text: str) -> str:
    lines = _mutate_lines(text.split("\n"), draw(_LINE_OPS))
    for _ in range(draw(st.integers(0, 3))):
        keyed = [i for i, line in enumerate(lines) if "=" in line and not line.lstrip().startswith("#")]
        if not keyed:
            break
        i = keyed[draw(st.integers(0, len(keyed) - 1))]
        key, _, rest = lines[i].partition("=")
        value = draw(st.sampled_from(TOML_VALUES))
        if "{" in rest and draw(st.booleans()):  # inside an inline rule table: replace its value or unit
            field = draw(st.sampled_from(["value", "unit"]))
            head, sep, tail = rest.partition(f"{field} = ")
            rest = head + sep + value + tail[tail.find(",") if "," in tail else tail.find("}"):] if sep else " " + value
        else:
            rest = " " + value
        lines[i] = key + "=" + rest
    text = "\n".join(lines)
    if draw(st.booleans()):
        old, new = draw(st.sampled_from(UNIT_SWAPS))
        text = text.replace(old, new, 1)
    if draw(st.integers(0, 5)) == 0:
        text = text[: draw(st.integers(0, len(text)))]
    return text


@st.composite
def plan_texts(draw):
    return _toml_mutant(draw, (DEMO / "plan.toml").read_text(encoding="utf-8"))


@st.composite
def rules_texts(draw):
    return _toml_mutant(draw, (DEMO / "rules.toml").read_text(encoding="utf-8"))


def _finite_numbers(obj) -> bool:
    if isinstance(obj, float):
        return math.isfinite(obj)
    if isinstance(obj, dict):
        return all(_finite_numbers(v) for v in obj.values())
    if isinstance(obj, (list, tuple)):
        return all(_finite_numbers(v) for v in obj)
    return True


@FAST
@given(text=plan_texts())
def test_fuzz_plan_toml(text):
    plan = _attempt("plan TOML", parse_plan_text, text, source="plan.toml")
    if plan is not None:
        for section in (plan.study, plan.animals, plan.probes, plan.target, plan.acquisition, plan.analysis):
            assert _finite_numbers(section)
        assert plan.probes and len(plan.acquisition["channels"]) >= len(plan.probes)
        assert all(p["dose_nmol_per_kg"] > 0 for p in plan.probes)


@FAST
@given(text=rules_texts())
def test_fuzz_rules_toml(text):
    rules = _attempt("rules TOML", parse_rules_text, text, filename="rules.toml")
    if rules is not None:
        for rule in rules:
            assert math.isfinite(rule.value) and rule.value >= 0, rule
            low, high = rule.valid_range
            assert low <= rule.value <= high, rule


# --------------------------------------------------------------------------- TIFF files and their metadata

class _Samples(tuple):
    """(bytes by name, pixel data), with a short repr for hypothesis' falsifying examples."""

    def __new__(cls, samples, data):
        return super().__new__(cls, (samples, data))

    def __repr__(self) -> str:
        return f"<{len(self[0])} TIFF samples>"


@pytest.fixture(scope="module")
def tiff_samples():
    """Small valid stacks in several layouts tifffile writes (bytes), with their pixel data."""
    folder = Path(tempfile.mkdtemp(prefix="fuzz_tiff_"))
    rng = np.random.default_rng(7)
    data = rng.integers(0, 4000, (3, 16, 16)).astype(np.uint16)
    samples = {}
    write_stack(folder / "ome.tif", data, channel_names=["665", "700", "780"], pixel_size_um=(6.5, 6.5),
                dtype=np.uint16)
    tifffile.imwrite(folder / "plain.tif", data, photometric="minisblack")
    tifffile.imwrite(folder / "zlib.tif", data, photometric="minisblack", compression="zlib")
    tifffile.imwrite(folder / "tiled.tif", data, photometric="minisblack", tile=(16, 16))
    tifffile.imwrite(folder / "big.tif", data, photometric="minisblack", bigtiff=True)
    for name in ("ome.tif", "plain.tif", "zlib.tif", "tiled.tif", "big.tif"):
        samples[name] = (folder / name).read_bytes()
    samples["demo stack.tif"] = (DEMO / "stack.tif").read_bytes()
    yield _Samples(samples, data)
    for p in folder.iterdir():
        p.unlink()
    folder.rmdir()


def _read(test: str, path: Path):
    out = _attempt(test, read_stack, path)
    if out is not None:
        array, info = out
        assert array.shape == info.shape
        if info.channel_names is not None:
            assert len(info.channel_names) == info.n_channels
        if info.pixel_size_um is not None:
            assert all(math.isfinite(v) and v > 0 for v in info.pixel_size_um)
    return out


@SLOW
@given(which=st.integers(0, 5), cut=st.floats(0.0, 0.999))
def test_fuzz_truncated_tiff_is_refused_or_exact(tmp_path, tiff_samples, which, cut):
    """A file cut short is refused; it may only be read if the bytes lost were not needed (same pixels)."""
    samples, _ = tiff_samples
    name = sorted(samples)[which]
    raw = samples[name]
    path = tmp_path / "cut.tif"
    path.write_bytes(raw[: int(cut * len(raw))])
    out = _read("TIFF truncated", path)
    if out is not None:
        full = tmp_path / "full.tif"
        full.write_bytes(raw)
        expected, _ = read_stack(full)
        np.testing.assert_array_equal(out[0], expected)


@SLOW
@given(which=st.integers(0, 5), flips=st.lists(st.tuples(st.integers(0, 2**31), st.integers(0, 255)), min_size=1,
                                               max_size=12))
def test_fuzz_tiff_byte_flips(tmp_path, tiff_samples, which, flips):
    samples, _ = tiff_samples
    raw = bytearray(samples[sorted(samples)[which]])
    header = min(len(raw), 4096)  # the header, the first IFD and metadata live in the first few kB
    for pos, value in flips:
        raw[pos % header] = value
    path = tmp_path / "flipped.tif"
    path.write_bytes(bytes(raw))
    _read("TIFF byte flips", path)


@SLOW
@given(data=st.binary(max_size=200), magic=st.sampled_from([b"", b"II*\x00", b"MM\x00*", b"II+\x00\x08\x00\x00\x00"]))
def test_fuzz_tiff_random_bytes(tmp_path, data, magic):
    path = tmp_path / "random.tif"
    path.write_bytes(magic + data)
    _read("TIFF random bytes", path)


_OME_SIZES = ["6.5", "nan", "inf", "-1", "0", "abc", "1e400", ""]
_OME_UNITS = ["µm", "um", "nm", "mm", "furlong", "", "%"]


@st.composite
def ome_descriptions(draw):
    names = draw(st.lists(st.sampled_from(["665", "700", "780", "", "a&b", "ch<1>", "700"]), min_size=0, max_size=4))
    channels = "".join(f'<Channel ID="Channel:0:{i}" Name="{n}" SamplesPerPixel="1"/>' for i, n in enumerate(names))
    sx, sy = draw(st.sampled_from(_OME_SIZES)), draw(st.sampled_from(_OME_SIZES))
    ux, uy = draw(st.sampled_from(_OME_UNITS)), draw(st.sampled_from(_OME_UNITS))
    size_c = draw(st.sampled_from(["3", "4", "1", "0", "-3", "x"]))
    xml = ('<?xml version="1.0" encoding="UTF-8"?><OME xmlns="http://www.openmicroscopy.org/Schemas/OME/2016-06">'
           '<Image ID="Image:0" Name="fuzz"><Pixels ID="Pixels:0" DimensionOrder="XYCZT" Type="uint16" '
           f'SizeX="16" SizeY="16" SizeC="{size_c}" SizeZ="1" SizeT="1" PhysicalSizeX="{sx}" PhysicalSizeXUnit="{ux}" '
           f'PhysicalSizeY="{sy}" PhysicalSizeYUnit="{uy}">{channels}'
           '<TiffData IFD="0" PlaneCount="3"/></Pixels></Image></OME>')
    mutation = draw(st.sampled_from(["keep", "cut", "insert", "drop-close"]))
    if mutation == "cut":
        xml = xml[: draw(st.integers(0, len(xml)))]
    elif mutation == "insert":
        i = draw(st.integers(0, len(xml)))
        xml = xml[:i] + draw(st.text(max_size=20)) + xml[i:]
    elif mutation == "drop-close":
        xml = xml.replace("</Pixels>", "", 1)
    return xml


@SLOW
@given(description=ome_descriptions())
def test_fuzz_ome_xml_metadata(tmp_path, tiff_samples, description):
    _, data = tiff_samples
    path = tmp_path / "described.ome.tif"
    try:
        tifffile.imwrite(path, data, photometric="minisblack", description=description, metadata=None)
    except (ValueError, UnicodeEncodeError):  # tifffile will not write this description: nothing to read
        return
    out = _read("TIFF with garbled OME-XML", path)
    if out is not None:
        array, info = out
        assert info.n_channels * int(np.prod(info.spatial_shape)) == data.size
        np.testing.assert_array_equal(np.sort(array.reshape(-1)), np.sort(data.reshape(-1)))


def test_fuzz_outcomes_cover_both_results():
    """The mutations are not all refused nor all accepted: both parser paths were exercised (when run together)."""
    seen = {name: counts for name, counts in OUTCOMES.items() if sum(counts.values()) >= 50}
    for name, counts in seen.items():
        if name in ("spectra CSV (random bytes)", "TIFF random bytes", "TIFF truncated"):
            continue  # random bytes and cut files are (almost) always refused
        assert counts["parsed"] > 0 and counts["refused (InputError)"] > 0, (name, counts)
