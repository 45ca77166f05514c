"""What a careless user and a failing disk can do to the outputs of every command that writes.

* No silent overwrite: an output or side file that exists and was not written by the same run is
  refused (exit 2, the file untouched) unless ``--overwrite`` is given.
* Write failures are one line and exit 2: a read-only folder, a missing folder, a full disk (a real
  one, made with ``RLIMIT_FSIZE`` in a child process, and a simulated ``ENOSPC``), an output that is a
  folder; nothing that looks finished is left behind.
* All or nothing: the files of one run appear together (:func:`probeplan.io.atomic.output_batch`).
* Concurrent runs into one folder keep both results and both manifest entries.
* Strict JSON everywhere (``NaN``/``Infinity`` become ``null`` with a note).
* Third-party noise (log records, warnings, thread errors) never reaches the terminal.
"""

from __future__ import annotations

import errno
import json
import logging
import os
import subprocess
import sys
import threading
import warnings
from multiprocessing import get_context
from pathlib import Path

import numpy as np
import pytest

from probeplan.cli.main import main
from probeplan.errors import InputError
from probeplan.io import atomic
from probeplan.io.atomic import (STAGING_PREFIX, json_text, output_batch, output_policy, update_json_file,
                                 write_json_atomic, write_text_atomic)

DEMO = Path(__file__).resolve().parents[1] / "demo_tissue"
STACK, REFS = DEMO / "stack.tif", DEMO / "references.csv"
SIDE = ("_stderr.tif", "_residual.tif", "_qc.json", "_overlay.png")


def _run(argv, capsys):
    code = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _one_line_refusal(code, err, *names):
    assert code == 2, f"exit {code}: {err!r}"
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, f"{len(lines)} lines: {err!r}"
    assert ";" in lines[0], f"no fix given: {err!r}"
    assert any(n in err for n in names), f"none of {names} in {err!r}"


def _listing(folder: Path) -> list[str]:
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))


def _depth(out_csv) -> list:
    return ["depth", "--probe", "CdTe:700", "--filter", "700/30", "--depth-max-mm", "2", "--csv", out_csv]


# --------------------------------------------------------------------------- no silent overwrite

def test_unmix_refuses_an_existing_file_that_is_not_an_input(tmp_path, capsys):
    truth = tmp_path / "ground_truth.tif"
    truth.write_bytes((DEMO / "ground_truth.tif").read_bytes())
    before = truth.read_bytes()
    code, _, err = _run(["unmix", STACK, "--references", REFS, "--out", truth], capsys)
    _one_line_refusal(code, err, "ground_truth.tif", "--overwrite")
    assert "already exists" in err
    assert truth.read_bytes() == before
    assert _listing(tmp_path) == ["ground_truth.tif"]


@pytest.mark.parametrize("suffix", SIDE)
def test_unmix_refuses_an_existing_side_file_and_writes_nothing(tmp_path, capsys, suffix):
    side = tmp_path / f"a{suffix}"
    side.write_text("someone else's file\n")
    code, _, err = _run(["unmix", STACK, "--references", REFS, "--out", tmp_path / "a.ome.tif"], capsys)
    _one_line_refusal(code, err, side.name)
    assert side.read_text() == "someone else's file\n"
    assert _listing(tmp_path) == [side.name]


def test_overwrite_replaces_and_a_rerun_without_it_is_refused(tmp_path, capsys):
    out = tmp_path / "a.ome.tif"
    (tmp_path / "a_qc.json").write_text("{}")
    assert _run(["unmix", STACK, "--references", REFS, "--out", out, "--overwrite"], capsys)[0] == 0
    qc = json.loads((tmp_path / "a_qc.json").read_text())
    assert qc["n_pixels"] == 128 * 128
    code, _, err = _run(["unmix", STACK, "--references", REFS, "--out", out], capsys)
    _one_line_refusal(code, err, "already exists")


def test_plan_and_depth_refuse_existing_outputs(tmp_path, capsys):
    report = tmp_path / "report"
    assert _run(["plan", DEMO / "plan.toml", "--rules", DEMO / "rules.toml", "--out", report], capsys)[0] == 0
    html = (report / "report.html").read_bytes()
    code, _, err = _run(["plan", DEMO / "plan.toml", "--rules", DEMO / "rules.toml", "--out", report], capsys)
    _one_line_refusal(code, err, "already exists")
    assert (report / "report.html").read_bytes() == html
    assert _run(["plan", DEMO / "plan.toml", "--rules", DEMO / "rules.toml", "--out", report, "--overwrite"],
                capsys)[0] == 0

    csv = tmp_path / "depth.csv"
    csv.write_text("mine\n")
    code, _, err = _run(_depth(csv), capsys)
    _one_line_refusal(code, err, "depth.csv")
    assert csv.read_text() == "mine\n"


def test_a_run_may_rewrite_its_own_files_but_not_others():
    import tempfile

    folder = Path(tempfile.mkdtemp())
    (folder / "theirs.txt").write_text("theirs")
    with output_policy():
        write_text_atomic(folder / "mine.txt", "1")
        write_text_atomic(folder / "mine.txt", "2")  # written by this run: may be written again
        with pytest.raises(InputError, match="theirs.txt: already exists and was not written by this run"):
            write_text_atomic(folder / "theirs.txt", "x")
    assert (folder / "mine.txt").read_text() == "2" and (folder / "theirs.txt").read_text() == "theirs"


# --------------------------------------------------------------------------- write failures

def _refuse_writes_in(monkeypatch, folder: Path, code: int) -> None:
    """Make every file creation under ``folder`` fail as a read-only folder or a full disk would."""
    real_open = os.open

    def fake_open(path, flags, *args, **kwargs):
        if str(path).startswith(str(folder)) and flags & os.O_CREAT:
            raise OSError(code, os.strerror(code), str(path))
        return real_open(path, flags, *args, **kwargs)

    monkeypatch.setattr(atomic.os, "open", fake_open)
    real_mkdir = Path.mkdir

    def fake_mkdir(self, *args, **kwargs):
        if str(self).startswith(str(folder)):
            raise OSError(code, os.strerror(code), str(self))
        return real_mkdir(self, *args, **kwargs)

    monkeypatch.setattr(Path, "mkdir", fake_mkdir)


def _writing_commands(folder: Path) -> dict[str, list]:
    return {
        "unmix": ["unmix", STACK, "--references", REFS, "--out", folder / "a.ome.tif"],
        "plan": ["plan", DEMO / "plan.toml", "--out", folder / "report"],
        "depth --csv": _depth(folder / "d.csv"),
        "channels --plot": ["channels", "--probe", "CdTe:700", "--probe", "CdTeSe:780", "--extinction", "5e5",
                            "--extinction", "5e5", "--filter", "700/30", "--filter", "780/40", "--plot",
                            folder / "c.png"],
        "phantom --out": ["phantom", "--wavelength-nm", "700", "--mu-a", "0.3", "--mu-s-prime", "10", "--out",
                          folder / "recipe"],
    }


@pytest.mark.parametrize("command", ["unmix", "plan", "depth --csv", "channels --plot", "phantom --out"])
@pytest.mark.parametrize("code", [errno.EACCES, errno.EROFS, errno.ENOSPC], ids=["read-only", "read-only-fs", "full"])
def test_write_failures_are_one_line_and_leave_nothing(tmp_path, capsys, monkeypatch, command, code):
    folder = tmp_path / "out"
    folder.mkdir()
    _refuse_writes_in(monkeypatch, folder, code)
    rc, _, err = _run(_writing_commands(folder)[command], capsys)
    _one_line_refusal(rc, err, str(folder))
    assert ("no space left" in err) if code == errno.ENOSPC else ("read-only" in err)
    monkeypatch.undo()
    assert _listing(folder) == []


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
@pytest.mark.parametrize("command", ["unmix", "plan", "depth --csv"])
def test_a_real_read_only_folder(tmp_path, capsys, command):  # pragma: no cover - runs where tests are not root
    folder = tmp_path / "out"
    folder.mkdir()
    folder.chmod(0o555)
    try:
        rc, _, err = _run(_writing_commands(folder)[command], capsys)
    finally:
        folder.chmod(0o755)
    _one_line_refusal(rc, err, str(folder))
    assert _listing(folder) == []


@pytest.mark.parametrize("command", ["unmix", "plan", "depth --csv"])
def test_missing_folder_and_folder_in_the_way(tmp_path, capsys, command):
    missing = tmp_path / "missing" / "deeper"
    argv = _writing_commands(missing)[command]
    if command == "plan":  # plan creates its report folder: give a file where a folder is needed
        (tmp_path / "missing").write_text("a file")
    rc, _, err = _run(argv, capsys)
    _one_line_refusal(rc, err, "missing")
    if command != "plan":
        assert not (tmp_path / "missing").exists()


def test_output_that_is_a_folder(tmp_path, capsys):
    (tmp_path / "d.csv").mkdir()
    rc, _, err = _run(_depth(tmp_path / "d.csv"), capsys)
    _one_line_refusal(rc, err, "d.csv")
    assert "is a folder" in err


_FULL_DISK = """
import resource, signal, sys
signal.signal(signal.SIGXFSZ, signal.SIG_IGN)   # a write past the limit fails with EFBIG instead of killing
resource.setrlimit(resource.RLIMIT_FSIZE, (100_000, 100_000))
from probeplan.cli.main import main
sys.exit(main(sys.argv[1:]))
"""


def test_a_real_full_disk_mid_run(tmp_path):
    """The file-size limit stops the 256 kB abundance file part way: exit 2, one line, nothing left."""
    out = tmp_path / "out"
    out.mkdir()
    proc = subprocess.run([sys.executable, "-c", _FULL_DISK, "unmix", str(STACK), "--references", str(REFS),
                           "--out", str(out / "a.ome.tif")], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "a.ome.tif" in lines[0] and "no space left" in lines[0], proc.stderr
    assert _listing(out) == []


def test_enospc_while_writing_a_side_file(tmp_path, capsys, monkeypatch):
    """The disk fills up after the stacks are written, while the QC file is flushed: nothing appears."""
    real_fsync = os.fsync
    calls = {"n": 0}

    def fsync(fd):
        calls["n"] += 1
        if calls["n"] > 3:  # the three stacks pass, the first small file fails
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_fsync(fd)

    monkeypatch.setattr(atomic.os, "fsync", fsync)
    rc, _, err = _run(["unmix", STACK, "--references", REFS, "--out", tmp_path / "a.ome.tif"], capsys)
    _one_line_refusal(rc, err, "no space left")
    assert _listing(tmp_path) == []


# --------------------------------------------------------------------------- all or nothing

def test_a_batch_appears_together_or_not_at_all(tmp_path):
    with pytest.raises(KeyboardInterrupt), output_batch():
        write_text_atomic(tmp_path / "a.txt", "a")
        write_json_atomic(tmp_path / "b.json", {"b": 1})
        assert not (tmp_path / "a.txt").exists()
        raise KeyboardInterrupt
    assert _listing(tmp_path) == []
    with output_batch():
        write_text_atomic(tmp_path / "a.txt", "a")
        write_json_atomic(tmp_path / "b.json", {"b": 1})
    assert _listing(tmp_path) == ["a.txt", "b.json"]


def test_a_killed_runs_staging_folder_is_removed_by_the_next_run(tmp_path):
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    stale = tmp_path / f"{STAGING_PREFIX}{int(dead.stdout)}-abcd"
    stale.mkdir()
    (stale / "a.ome.tif").write_bytes(b"half")
    alive = tmp_path / f"{STAGING_PREFIX}{os.getpid()}-efgh"  # a run still going: left alone
    alive.mkdir()
    with output_batch():
        write_text_atomic(tmp_path / "x.txt", "x")
    assert _listing(tmp_path) == [alive.name, "x.txt"]


def test_failure_in_the_middle_of_a_report_leaves_no_report(tmp_path, capsys, monkeypatch):
    import probeplan.report.document as document

    def broken(report):
        raise OSError(errno.ENOSPC, "No space left on device", str(tmp_path / "r" / "report.html"))

    monkeypatch.setattr(document, "render_html", broken)
    rc, _, err = _run(["plan", DEMO / "plan.toml", "--out", tmp_path / "r"], capsys)
    assert rc == 2 and len(err.strip().splitlines()) == 1, err
    assert _listing(tmp_path) == []


# --------------------------------------------------------------------------- concurrent runs

def _add_entries(args):
    path, worker, n = args
    for i in range(n):
        def add(manifest, key=f"w{worker}-{i}"):
            manifest.setdefault("entries", {})[key] = {"worker": worker}
            return manifest
        update_json_file(path, add, read=lambda p: json.loads(p.read_text()) if p.exists() else {"entries": {}})


def test_concurrent_manifest_updates_keep_every_entry(tmp_path):
    path = tmp_path / "manifest.json"
    with get_context("spawn").Pool(4) as pool:
        pool.map(_add_entries, [(path, w, 25) for w in range(4)])
    entries = json.loads(path.read_text())["entries"]
    assert len(entries) == 100
    assert _listing(tmp_path) == ["manifest.json"]


def test_two_unmix_runs_into_one_folder_keep_both(tmp_path):
    for name in ("s1.tif", "s2.tif"):
        (tmp_path / name).write_bytes(STACK.read_bytes())
    out = tmp_path / "out"
    out.mkdir()
    procs = [subprocess.Popen([sys.executable, "-m", "probeplan", "unmix", str(tmp_path / name), "--references",
                               str(REFS), "--out", str(out / name.replace(".tif", ".ome.tif"))],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for name in ("s1.tif", "s2.tif")]
    for p in procs:
        _, err = p.communicate(timeout=180)
        assert p.returncode == 0, err
    entries = json.loads((out / "probeplan_unmix_manifest.json").read_text())["entries"]
    assert set(entries) == {"s1.tif", "s2.tif"} and all(e["status"] == "done" for e in entries.values())
    for stem in ("s1", "s2"):
        assert all((out / f"{stem}{s}").is_file() for s in (".ome.tif", *SIDE))


# --------------------------------------------------------------------------- strict JSON

def _strict(text: str):
    def refuse(name):
        raise AssertionError(f"non-standard JSON constant {name}")

    return json.loads(text, parse_constant=refuse)


def test_json_is_strict_with_a_note_for_each_null():
    data = _strict(json_text({"rms": float("inf"), "values": [1.0, float("nan"), np.float32(-np.inf)],
                              "n": np.int64(3)}))
    assert data["rms"] is None and data["values"] == [1.0, None, None] and data["n"] == 3
    assert data["null_values"] == ["rms: inf", "values[1]: NaN", "values[2]: -inf"]


def test_print_json_is_strict(capsys):
    from probeplan.cli.common import print_json

    print_json({"x": float("nan")})
    assert _strict(capsys.readouterr().out) == {"x": None, "null_values": ["x: NaN"]}


# --------------------------------------------------------------------------- quiet failures

def test_third_party_noise_never_reaches_the_terminal(capsys, monkeypatch):
    import probeplan.cli.commands.check as check

    def noisy(args):
        logging.getLogger("distributed.core").error("Event loop was unresponsive in Scheduler for 3.05s")
        logging.getLogger("asyncio").error("Task was destroyed but it is pending!")
        warnings.warn("this is deprecated", DeprecationWarning, stacklevel=1)
        worker = threading.Thread(target=lambda: 1 / 0)
        worker.start()
        worker.join()
        sys.stderr.write("tornado.application - ERROR - Exception in callback\n")
        raise InputError("plan.toml:3: animals.size: got 0; give a size")

    handler = logging.StreamHandler(sys.stderr)  # as a library that configures its own logging would
    logging.getLogger("distributed").addHandler(handler)
    monkeypatch.setattr(check, "run", noisy)
    try:
        code, out, err = _run(["check", DEMO / "plan.toml"], capsys)
    finally:
        logging.getLogger("distributed").removeHandler(handler)
    assert code == 2
    assert err == "probeplan check: error: plan.toml:3: animals.size: got 0; give a size\n", err


# --------------------------------------------------------------------------- the study command

def _tiny_study(folder: Path) -> list[str]:
    """Two animals (one per group), one time point, two probes in three channels (our own invented data)."""
    from probeplan.io.stacks import write_stack

    m = np.array([[0.6, 0.1], [0.3, 0.3], [0.1, 0.6]])
    channels = ["ch650", "ch700", "ch750"]
    (folder / "refs.csv").write_text("channel,dotA,dotB\n" + "".join(
        f"{c},{m[i, 0]},{m[i, 1]}\n" for i, c in enumerate(channels)))
    rng = np.random.default_rng(1)
    rows = ["animal,group,time_h,file"]
    for name, group in (("m1", "ctrl"), ("m2", "treated")):
        ab = np.full((2, 24, 24), 200.0)
        ab[0, 4:12, 4:12] = 800.0
        write_stack(folder / f"{name}.tif", rng.poisson(np.einsum("ck,kyx->cyx", m, ab)).astype(np.uint16),
                    channel_names=channels, dtype=np.uint16)
        rows.append(f"{name},{group},1,{name}.tif")
    (folder / "study.csv").write_text("\n".join(rows) + "\n")
    return ["study", str(folder / "study.csv"), "--references", str(folder / "refs.csv"),
            "--roi", "tumour:4,4,12,12", "--roi", "background:14,0,24,24", "--json"]


def test_study_rerun_resumes_in_its_own_folder_and_refuses_a_foreign_file(tmp_path, capsys):
    argv = _tiny_study(tmp_path)
    out = tmp_path / "out"
    code, stdout, err = _run([*argv, "--out", out], capsys)
    assert code == 0, err
    code, stdout, err = _run([*argv, "--out", out], capsys)  # a rerun resumes: its own files may be replaced
    assert code == 0, err
    assert sorted(json.loads(stdout)["resumed"]) == ["m1_1h", "m2_1h"] or len(json.loads(stdout)["resumed"]) == 2
    entries = json.loads((out / "study_manifest.json").read_text())["entries"]
    assert len(entries) == 2 and all(e["status"] == "done" for e in entries.values())

    other = tmp_path / "other"
    other.mkdir()
    (other / "groups.csv").write_text("someone else's table\n")
    code, _, err = _run([*argv, "--out", other], capsys)
    _one_line_refusal(code, err, "groups.csv")
    assert (other / "groups.csv").read_text() == "someone else's table\n"
    assert _listing(other) == ["groups.csv"]
