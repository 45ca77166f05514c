"""Walk every subcommand with bad inputs: exit 2, a short message naming the file or option and the fix, no output.

Subcommands are discovered as ``probeplan.cli.main`` discovers them.  Each one with a file input is
given that file missing, empty, truncated (the first half of a valid demo file), of the wrong
type (a PNG or a TOML file where a TIFF/CSV is expected) and in the wrong unit; numeric options
are given NaN, a negative number and text.  The checks: exit status 2, at most three lines on
stderr naming the file (or option) with a fix (``where: problem; fix``), no traceback, and no
partial output (the output path does not exist afterwards, an existing output folder is
unchanged).  ``demo`` runs the whole study, so only its bad ``--out`` is tried here (it runs in
tests/test_demo.py); ``app`` starts a server, so only its bad options are tried.
"""

from __future__ import annotations

import hashlib
import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from probeplan.cli.main import _command_modules, main

DEMO = Path(__file__).resolve().parents[1] / "demo_tissue"
COMMANDS = [name for name, _ in _command_modules()]

#: A minimal PNG (8-bit greyscale 1x1), a file of the wrong type for every input.
PNG = bytes.fromhex("89504e470d0a1a0a0000000d49484452000000010000000108000000003a7e9b55"
                    "0000000a4944415478da63600000000200015e2ed4cb0000000049454e44ae426082")


def _emission_csv(unit: str = "nm") -> str:
    wl = np.arange(640.0, 781.0, 10.0)
    values = np.exp(-0.5 * ((wl - 700.0) / 15.0) ** 2)
    if unit == "um":  # the same curve with wavelengths in micrometres
        return "wavelength (µm),dot\n" + "".join(f"{w / 1000:g},{v:.4f}\n" for w, v in zip(wl, values, strict=True))
    return "# invented emission curve\nwavelength_nm,dot\n" + "".join(f"{w:g},{v:.4f}\n" for w, v in
                                                                       zip(wl, values, strict=True))


def _truncated(data: bytes) -> bytes:
    """The first half of a file; a text table is cut mid-row, just after a separator, as a copy cut short is.

    (A CSV cut exactly at the end of a row is a valid, shorter table: nothing can tell it apart.)
    """
    half = data[: len(data) // 2]
    if half.isascii() and b"," in half and not half.startswith(b"II"):
        return half[: half.rindex(b",") + 1]
    return half


def _snapshot(folder: Path) -> dict:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _run(argv, capsys):
    code = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _assert_refused(code, err, *names):
    assert code == 2, f"exit {code}, stderr: {err!r}"
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    assert 1 <= len(lines) <= 3, f"stderr has {len(lines)} lines: {err!r}"
    assert ";" in err, f"no fix given: {err!r}"
    assert any(n in err for n in names), f"none of {names} named in {err!r}"


# --------------------------------------------------------------------------- file inputs, per command

def _bad_files(tmp_path: Path, kind: str) -> dict[str, tuple[Path, str]]:
    """Bad versions of one input kind: case -> (path, text the message must contain)."""
    good = {
        "spectra": _emission_csv().encode(),
        "references": (DEMO / "references.csv").read_bytes(),
        "stack": (DEMO / "stack.tif").read_bytes(),
        "plan": (DEMO / "plan.toml").read_bytes(),
        "rules": (DEMO / "rules.toml").read_bytes(),
    }[kind]
    suffix = {"spectra": ".csv", "references": ".csv", "stack": ".tif", "plan": ".toml", "rules": ".toml"}[kind]
    wrong_unit = {
        "spectra": _emission_csv("um").encode(),
        # channel names in µm: they no longer name the stack's channels (665, 700, 780, 880 nm)
        "references": good.replace(b"\n665,", b"\n0.665,").replace(b"\n700,", b"\n0.7,"),
        # a stack whose channels are named in µm: no reference row matches them
        "stack": None,
        "plan": good.replace(b"dose_nmol_per_kg = 8", b"dose_mg_per_kg = 0.2", 1),
        "rules": good.replace(b'iv = { value = 5.0, unit = "mL/kg"', b'iv = { value = 0.1, unit = "mL"', 1),
    }[kind]
    folder = tmp_path / "inputs"
    folder.mkdir(exist_ok=True)
    cases = {}
    cases["missing"] = (folder / f"missing{suffix}", f"missing{suffix}")
    for name, data in (("empty", b""), ("truncated", _truncated(good)), ("png", PNG),
                       ("toml", b'[study]\ntitle = "not this file"\n'), ("wrong_unit", wrong_unit)):
        if name == "toml" and kind in ("plan", "rules"):
            continue
        path = folder / f"{name}{suffix}"
        if kind == "stack" and name == "wrong_unit":
            from probeplan.io.stacks import write_stack

            write_stack(path, np.zeros((4, 8, 8), np.uint16), channel_names=["0.665", "0.7", "0.78", "0.88"],
                        dtype=np.uint16)
        else:
            path.write_bytes(data)
        cases[name] = (path, path.name)
    return cases


def _file_cases():
    out = []
    for kind, commands in (("spectra", ["depth", "channels", "design"]), ("references", ["unmix", "study"]),
                           ("stack", ["unmix", "study"]), ("plan", ["plan", "check"]), ("rules", ["plan", "check"])):
        for command in commands:
            for case in ("missing", "empty", "truncated", "png", "toml", "wrong_unit"):
                if case == "toml" and kind in ("plan", "rules"):
                    continue
                out.append(pytest.param(command, kind, case, id=f"{command}-{kind}-{case}"))
    return out


def _argv(command: str, kind: str, bad: Path, out: Path) -> list:
    spectra = {"depth": ["depth", "--probe", f"CdTe:700@{bad}", "--filter", "700/30", "--csv", out],
               "channels": ["channels", "--probe", f"CdTe:700@{bad}", "--probe", "CdTeSe:780", "--filter", "700/30",
                            "--filter", "780/40", "--plot", out],
               "design": ["design", "--candidate-probe", f"CdTe:700@{bad}", "--candidate-probe", "CdTeSe:780",
                          "--candidate-filter", "700/30", "--candidate-filter", "780/40", "--k", "2",
                          "--depth-mm", "2", "--json"]}
    if kind == "spectra":
        return spectra[command]
    if command in ("unmix", "study"):
        stack = bad if kind == "stack" else DEMO / "stack.tif"
        refs = bad if kind == "references" else DEMO / "references.csv"
        if command == "unmix":
            return ["unmix", stack, "--references", refs, "--out", out]
        table = bad.parent / "study.csv"  # one acquisition: the stack under test
        table.write_text(f"animal,group,time_h,file\nm1,g,1,{stack}\n")
        return ["study", table, "--references", refs, "--out", out, "--roi", "background:0,0,8,8"]
    plan = bad if kind == "plan" else DEMO / "plan.toml"
    rules = bad if kind == "rules" else DEMO / "rules.toml"
    if command == "plan":
        return ["plan", plan, "--rules", rules, "--out", out]
    return ["check", plan, "--rules", rules]


@pytest.mark.parametrize(("command", "kind", "case"), _file_cases())
def test_bad_input_files(tmp_path, capsys, command, kind, case):
    path, named = _bad_files(tmp_path, kind)[case]
    before = path.read_bytes() if path.exists() else None
    outdir = tmp_path / "results"
    outdir.mkdir()
    (outdir / "keep.txt").write_text("earlier result\n")
    snapshot = _snapshot(outdir)
    out = outdir / ("new_report" if command == "plan" else "out.ome.tif" if command == "unmix" else "out.csv"
                    if command == "depth" else "study_out" if command == "study" else "out.png")
    code, _, err = _run(_argv(command, kind, path, out), capsys)
    _assert_refused(code, err, named, str(path))
    assert not out.exists(), "partial output left behind"
    assert _snapshot(outdir) == snapshot, "the existing output folder changed"
    assert not list(outdir.glob(".*.part")), "temporary file left behind"
    if before is not None:
        assert path.read_bytes() == before, "an input file was modified"


def test_unmix_folder_of_bad_stacks_leaves_no_output_folder(tmp_path, capsys):
    folder = tmp_path / "stacks"
    folder.mkdir()
    (folder / "a.tif").write_bytes(_truncated((DEMO / "stack.tif").read_bytes()))
    out = tmp_path / "new" / "abundances"
    code, _, err = _run(["unmix", folder, "--references", DEMO / "references.csv", "--out", out], capsys)
    _assert_refused(code, err, "a.tif")
    assert not (tmp_path / "new").exists(), "the output folder created for the run was left behind"


def test_unmix_folder_with_colliding_output_names_is_refused(tmp_path, capsys):
    folder = tmp_path / "stacks"
    folder.mkdir()
    for name in ("a.tif", "a.v2.tif"):  # both would become a.ome.tif
        (folder / name).write_bytes((DEMO / "stack.tif").read_bytes())
    out = tmp_path / "out"
    code, _, err = _run(["unmix", folder, "--references", DEMO / "references.csv", "--out", out], capsys)
    _assert_refused(code, err, "a.ome.tif")
    assert not out.exists()


def test_library_refuses_a_user_filter_in_percent(capsys, _isolated_user_library):
    filters = _isolated_user_library / "filters"
    filters.mkdir()
    bad = filters / "my_bandpass.csv"
    bad.write_text("wavelength_nm,my bandpass\n690,1.0\n700,93.0\n710,1.0\n")  # percent, not fraction
    code, _, err = _run(["library", "list"], capsys)
    _assert_refused(code, err, "my_bandpass.csv")
    bad.write_text("wavelength_nm,my bandpass [%]\n690,0.01\n700,0.93\n710,0.01\n")
    code, _, err = _run(["library", "list", "--kind", "filter"], capsys)
    _assert_refused(code, err, "my_bandpass.csv")


def test_demo_refuses_an_existing_file_as_out(tmp_path, capsys):
    target = tmp_path / "notes.txt"
    target.write_text("keep me\n")
    code, _, err = _run(["demo", "--out", target], capsys)
    _assert_refused(code, err, "--out")
    assert target.read_text() == "keep me\n"


@pytest.mark.parametrize("argv", [["--port", "0"], ["--port", "70000"], ["--port", "nan"], ["--port", "-1"],
                                  ["--max-upload-mb", "0"], ["--max-upload-mb", "abc"], ["--host", " "]],
                         ids=lambda a: " ".join(a))
def test_app_bad_options_exit_2_without_starting(capsys, monkeypatch, argv):
    import probeplan.cli.commands.app as app

    def _no_launch(command):  # the server must never start in this test
        raise AssertionError(f"the page was launched: {command}")

    monkeypatch.setattr(app, "_launch", _no_launch)
    code, _, err = _run(["app", *argv], capsys)
    _assert_refused(code, err, argv[0])


# --------------------------------------------------------------------------- numeric options

_DEPTH = ["depth", "--probe", "CdTe:700", "--filter", "700/30", "--json"]
_CHANNELS = ["channels", "--probe", "CdTe:700", "--probe", "CdTeSe:780", "--extinction", "5e5", "--extinction", "5e5",
             "--filter", "700/30", "--filter", "780/40", "--json"]
_DESIGN = ["design", "--candidate-probe", "CdTe:700", "--candidate-probe", "CdTeSe:780", "--candidate-filter",
           "700/30", "--candidate-filter", "780/40", "--k", "2", "--depth-mm", "2", "--json"]
_UNMIX = ["unmix", str(DEMO / "stack.tif"), "--references", str(DEMO / "references.csv")]
_NUMERIC = {
    "depth": (_DEPTH, ["--depth-max-mm", "--depth-step-mm", "--sbr-threshold", "--irradiance", "--excitation-nm",
                       "--linewidth-nm", "--led-fwhm-nm", "--exposure-s", "--size-mm", "--concentration-uM",
                       "--uptake-ratio", "--af-yield", "--f-number", "--magnification", "--binning", "--extinction"]),
    "channels": (_CHANNELS, ["--depth-mm", "--irradiance", "--exposure-s", "--size-mm", "--concentration-uM",
                             "--uptake-ratio", "--excitation-nm"]),
    "design": (_DESIGN, ["--depth-mm", "--irradiance", "--illumination-s", "--exposure-s", "--k", "--channels",
                         "--top", "--binning", "--excitation-nm", "--size-mm"]),
    "unmix": (_UNMIX, ["--saturation", "--gain", "--read-noise", "--memory-mb"]),
    "study": (["study", "not-read.csv", "--references", str(DEMO / "references.csv"), "--out", "not-written"],
              ["--gain", "--read-noise", "--channel-axis"]),
    "dots size": (["dots", "size", "CdSe"], ["--peak", "--diameter", "--emission"]),
    "dots conc": (["dots", "conc", "CdSe", "--peak", "550", "--absorbance", "0.1"], ["--path-cm", "--peak", "--absorbance"]),
    "dots dose": (["dots", "dose", "--mass-g", "20", "--stock-uM", "10", "--dose-nmol-per-kg", "8"],
                  ["--mass-g", "--stock-uM", "--dose-nmol-per-kg"]),
    "app": (["app"], ["--port", "--max-upload-mb"]),
    "calibrate": (["calibrate", str(DEMO / "phantom.csv"), "--references", str(DEMO / "references.csv"),
                   "--depth-mm", "0"], ["--depth-mm", "--gain", "--read-noise"]),
    "phantom": (["phantom", "--wavelength-nm", "700", "--mu-a", "0.3", "--mu-s-prime", "10", "--scatterer",
                 "polystyrene", "--diameter-um", "1"], ["--wavelength-nm", "--mu-a", "--mu-s-prime", "--batch-ml",
                                                        "--diameter-um"]),
}


def _numeric_cases():
    for label, (_base, options) in _NUMERIC.items():
        for option in options:
            for value in ("nan", "-1", "abc"):
                yield pytest.param(label, option, value, id=f"{label}{option}={value}")


def _with_option(base: list, option: str, value: str) -> list:
    argv = list(base)
    if option in argv:  # replace the value already given
        i = argv.index(option)
        argv[i + 1] = value
    else:
        argv += [option, value]
    if option == "--extinction":
        argv = argv[:1] + ["--extinction", value] + [a for a in argv[1:] if a not in ("--extinction", value)]
    return argv


@pytest.mark.parametrize(("label", "option", "value"), list(_numeric_cases()))
def test_numeric_options_nan_negative_text(tmp_path, capsys, monkeypatch, label, option, value):
    import probeplan.cli.commands.app as app

    monkeypatch.setattr(app, "_launch", lambda command: pytest.fail(f"the page was launched: {command}"))
    base, _ = _NUMERIC[label]
    argv = _with_option(base, option, value)
    out = tmp_path / "out.ome.tif"
    if label in ("unmix", "calibrate", "phantom"):
        argv += ["--out", out]
    code, _, err = _run(argv, capsys)
    _assert_refused(code, err, option, option.lstrip("-").replace("-", "_"), "probeplan")
    assert not out.exists()
    assert not list(tmp_path.iterdir()), "something was written"


# --------------------------------------------------------------------------- the real process

def test_real_process_exit_code_and_stderr(tmp_path):
    bad = tmp_path / "stack.tif"
    bad.write_bytes(_truncated((DEMO / "stack.tif").read_bytes()))
    out = tmp_path / "a.ome.tif"
    proc = subprocess.run([sys.executable, "-m", "probeplan", "unmix", str(bad), "--references",
                           str(DEMO / "references.csv"), "--out", str(out)], capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "stack.tif" in lines[0] and "truncated" in lines[0], proc.stderr
    assert not out.exists() and sorted(p.name for p in tmp_path.iterdir()) == ["stack.tif"]


def test_real_process_usage_error(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "probeplan", "dots", "size", "CdSe", "--peak", "abc"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2 and "Traceback" not in proc.stderr and "--peak" in proc.stderr


def test_every_command_is_walked():
    walked = {"depth", "channels", "design", "unmix", "plan", "check", "library", "demo", "app", "dots", "study",
              "calibrate", "phantom"}
    assert set(COMMANDS) <= walked, f"new subcommands to add to the walk: {set(COMMANDS) - walked}"


# --------------------------------------------------------------------------- huge numbers under a memory limit

#: A memory ceiling for the sweeps below: far above what a refusal needs (about 110 MiB), far below what
#: building a plan with 9.2e18 sessions or a depth grid of 1e300 points would take.
_MEMORY_LIMIT_MB = 1024
_HUGE = ("9223372036854775807", "1e300")

_SWEEP_SCRIPT = """
import json, resource, sys
limit = {limit} * 2**20
resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
import probeplan.cli.commands.app as app
app._launch = lambda command: 99
from probeplan.cli.main import main
results = []
for argv in json.loads(sys.stdin.read()):
    code = main(argv)
    results.append(code)
print(json.dumps(results))
"""


def _sweep(cases: list[list[str]], tmp_path: Path) -> tuple[list[int], str]:
    """Run ``main`` on every argv in one interpreter under the memory limit; exit codes and stderr."""
    proc = subprocess.run([sys.executable, "-c", _SWEEP_SCRIPT.format(limit=_MEMORY_LIMIT_MB)], input=json.dumps(cases),
                          capture_output=True, text=True, timeout=300, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return json.loads(proc.stdout.strip().splitlines()[-1]), proc.stderr


def _plan_with(text: str, section: str, key: str, value: str) -> str:
    """The demo plan with ``key = value`` set in the first ``[section]`` / ``[[section]]`` table."""
    lines = text.splitlines()
    header = next(i for i, line in enumerate(lines) if line.strip() in (f"[{section}]", f"[[{section}]]"))
    end = next((i for i in range(header + 1, len(lines)) if lines[i].lstrip().startswith("[")), len(lines))
    for i in range(header + 1, end):
        if lines[i].split("=")[0].strip() == key:
            lines[i] = f"{key} = {value}"
            break
    else:
        lines.insert(header + 1, f"{key} = {value}")
    return "\n".join(lines) + "\n"


def _plan_numeric_fields():
    from probeplan.study.plan import SCHEMA

    for section, (fields, _, subs) in SCHEMA.items():
        for key, spec in fields.items():
            if spec.kind in ("number", "integer", "numbers", "pair"):
                yield section, key, spec
        for sub, sub_fields in subs.items():
            for key, spec in sub_fields.items():
                if spec.kind in ("number", "integer", "numbers", "pair"):
                    yield f"{section}.{sub}", key, spec


def test_every_plan_number_has_a_stated_range():
    fields = list(_plan_numeric_fields())
    assert len(fields) >= 30
    missing = [f"{s}.{k}" for s, k, spec in fields if spec.maximum is None or spec.minimum is None]
    assert not missing, f"plan numbers without a range: {missing}"


def test_huge_plan_numbers_are_refused_naming_line_and_range_within_a_memory_limit(tmp_path):
    # sessions_per_animal = 9223372036854775807 (valid TOML) once grew to 24 GB before the kernel killed it
    base = (DEMO / "plan.toml").read_text()
    cases, labels = [], []
    for section, key, spec in _plan_numeric_fields():
        if f"[{section}]" not in base:  # optional tables the demo plan leaves out (e.g. [[tissue.layers]])
            continue
        for huge in _HUGE:
            value = f"[{huge}, {huge}]" if spec.kind in ("numbers", "pair") else huge
            path = tmp_path / f"{section}.{key}.{huge[:4]}.toml"
            path.write_text(_plan_with(base, section, key, value))
            cases.append(["check", str(path)])
            labels.append(f"{section}.{key}={huge}")
    codes, err = _sweep(cases, tmp_path)
    assert codes == [2] * len(cases), [lab for lab, c in zip(labels, codes, strict=True) if c != 2]
    lines = err.strip().splitlines()
    assert len(lines) == len(cases), err[-3000:]
    for label, line in zip(labels, lines, strict=True):
        section, key = label.split("=")[0].rsplit(".", 1)
        assert re.search(rf"\.toml:\d+: {re.escape(section.split('.')[0])}.*{key}(\[\d\])?: .*allowed", line), (label, line)
        assert "Traceback" not in line


def test_every_numeric_option_has_a_stated_range():
    from probeplan.cli.common import OPTION_RANGES, numeric_options
    from probeplan.cli.main import build_parser

    missing = sorted({f"{a.option_strings[-1]} ({a.dest})" for a, _ in numeric_options(build_parser())
                      if a.dest not in OPTION_RANGES})
    assert not missing, f"numeric options without a range in probeplan.cli.common.OPTION_RANGES: {missing}"


def test_huge_option_values_are_refused_with_the_range_within_a_memory_limit(tmp_path):
    cases, labels = [], []
    for label, (base, options) in _NUMERIC.items():
        for option in options:
            if option == "--saturation":  # any full scale is valid (inf: no saturation)
                continue
            for huge in _HUGE:
                argv = _with_option(base, option, huge)
                if label in ("unmix", "calibrate"):
                    argv += ["--out", str(tmp_path / "out.ome.tif")]
                cases.append([str(a) for a in argv])
                labels.append(f"{label} {option}={huge}")
    codes, err = _sweep(cases, tmp_path)
    assert codes == [2] * len(cases), [lab for lab, c in zip(labels, codes, strict=True) if c != 2]
    lines = err.strip().splitlines()
    assert len(lines) == len(cases), err[-3000:]
    for label, line in zip(labels, lines, strict=True):
        option = label.split(" ")[-1].split("=")[0]
        assert option in line or "invalid" in line, (label, line)
    assert not (tmp_path / "out.ome.tif").exists()


def test_every_rule_has_a_finite_range_and_huge_values_are_refused_within_a_memory_limit(tmp_path):
    from probeplan.study.rules import default_rules

    rules = list(default_rules())
    assert len(rules) >= 20
    assert all(np.isfinite(r.valid_range[1]) for r in rules), [r.id for r in rules if not np.isfinite(r.valid_range[1])]
    cases, labels = [], []
    for rule in rules:
        for huge in _HUGE:
            path = tmp_path / f"{rule.id}.{huge[:4]}.toml"
            path.write_text(f'[{rule.id}]\nvalue = {huge}\nunit = "{rule.unit}"\n')
            cases.append(["check", str(DEMO / "plan.toml"), "--rules", str(path)])
            labels.append(f"{rule.id}={huge}")
    codes, err = _sweep(cases, tmp_path)
    assert codes == [2] * len(cases), [lab for lab, c in zip(labels, codes, strict=True) if c != 2]
    lines = err.strip().splitlines()
    assert len(lines) == len(cases), err[-3000:]
    for label, line in zip(labels, lines, strict=True):
        assert re.search(rf"\.toml:2: {re.escape(label.split('=')[0])}\.value: .*outside", line), (label, line)


def test_every_page_control_for_a_number_has_a_range():
    """Every st.number_input and st.slider of the page states min_value and max_value (read from the source)."""
    import ast

    app = Path(__file__).resolve().parents[1] / "app"
    missing, seen = [], 0
    for path in sorted(app.rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Call) and getattr(node.func, "attr", "") in ("number_input", "slider"):
                seen += 1
                keywords = {k.arg for k in node.keywords}
                if not {"min_value", "max_value"} <= keywords:
                    missing.append(f"{path.name}:{node.lineno}")
    assert seen >= 20
    assert not missing, f"page controls without a range: {missing}"
