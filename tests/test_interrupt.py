"""Interrupting ``probeplan unmix`` over a folder leaves only complete files; ``--resume`` finishes the job.

A real ``python -m probeplan unmix FOLDER`` process over eight 4 x 512 x 512 float32 stacks is
sent SIGINT or SIGTERM as soon as the first stack is recorded as finished (so the signal lands
while a later stack is being computed or written).  Afterwards every file in the output folder
must be complete (TIFFs readable with tifffile, JSON loadable, PNGs whole, manifest checksums
matching) with no temporary ``.*.part`` file left; a rerun with ``--resume`` must skip the
stacks already done (their files untouched) and finish the rest, and the final outputs must be
bit-for-bit those of an uninterrupted run.  SIGKILL, which leaves the process no chance to clean
up, may leave only a hidden staging folder (removed by the next run); every visible file belongs
to a stack recorded as done, and ``--resume`` redoes a stack whose output was damaged afterwards.
Also here: no command writes to one of its inputs.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile

from probeplan.cli.main import main

DEMO = Path(__file__).resolve().parents[1] / "demo_tissue"
MANIFEST = "probeplan_unmix_manifest.json"
N_STACKS, SHAPE = 8, (4, 512, 512)
PNG_SIGNATURE, PNG_END = b"\x89PNG\r\n\x1a\n", b"IEND\xaeB`\x82"


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _unmix_cmd(stacks: Path, refs: Path, out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "probeplan", "unmix", str(stacks), "--references", str(refs), "--out", str(out),
            "--json", *extra]


@pytest.fixture(scope="module")
def job(tmp_path_factory):
    """Eight stacks, their references, and the outputs of one uninterrupted run."""
    root = tmp_path_factory.mktemp("interrupt")
    stacks = root / "stacks"
    stacks.mkdir()
    # three Gaussian-like bands over four channels (invented, common practice, no source)
    M = np.array([[0.70, 0.10, 0.02], [0.25, 0.60, 0.08], [0.04, 0.25, 0.50], [0.01, 0.05, 0.40]])
    refs = root / "references.csv"
    refs.write_text("channel,a,b,c\n" + "".join(f"ch{c},{','.join(repr(float(v)) for v in M[c])}\n" for c in range(4)))
    rng = np.random.default_rng(11)
    for i in range(N_STACKS):
        abundance = rng.gamma(2.0, 200.0, (3, *SHAPE[1:])).astype(np.float32)
        counts = rng.poisson(np.einsum("ck,kyx->cyx", M, abundance)).astype(np.float32)
        tifffile.imwrite(stacks / f"s{i}.tif", counts, photometric="minisblack")
    reference = root / "reference_out"
    proc = subprocess.run(_unmix_cmd(stacks, refs, reference), capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    return {"stacks": stacks, "refs": refs, "reference": reference}


def _check_complete(folder: Path) -> dict:
    """Every file present is whole; returns the manifest's entries."""
    assert not [p.name for p in folder.iterdir() if p.name.startswith(".")], "temporary files left behind"
    for p in folder.iterdir():
        if p.suffix == ".tif":
            data = tifffile.imread(p)
            assert data.shape[-2:] == SHAPE[1:] and data.dtype == np.float32, p
        elif p.suffix == ".json":
            json.loads(p.read_text(encoding="utf-8"))
        elif p.suffix == ".png":
            raw = p.read_bytes()
            assert raw.startswith(PNG_SIGNATURE) and raw.endswith(PNG_END), p
    manifest = folder / MANIFEST
    entries = json.loads(manifest.read_text(encoding="utf-8"))["entries"] if manifest.exists() else {}
    done = {k: e for k, e in entries.items() if e["status"] == "done"}
    for entry in done.values():
        for path, digest in entry["outputs"].items():
            assert _sha256(Path(path)) == digest, f"{path} does not match the manifest"
    recorded = {Path(p).name for e in done.values() for p in e["outputs"]} | {MANIFEST}
    unrecorded = sorted(p.name for p in folder.iterdir() if p.name not in recorded)
    assert not unrecorded, f"files that look finished but no finished stack records: {unrecorded}"
    return done


def _wait_for_first_finished(proc: subprocess.Popen, manifest: Path, timeout_s: float = 120.0) -> None:
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout_s:
        if proc.poll() is not None:
            pytest.fail(f"the run ended (exit {proc.returncode}) before it could be interrupted")
        if manifest.exists():
            try:
                entries = json.loads(manifest.read_text(encoding="utf-8"))["entries"]
                if any(e["status"] == "done" for e in entries.values()):
                    return
            except (ValueError, KeyError):  # pragma: no cover - the manifest is written atomically
                pytest.fail("the manifest was seen half-written")
        time.sleep(0.005)
    pytest.fail("no stack finished in time")


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_interrupt_then_resume_equals_an_uninterrupted_run(tmp_path, job, signum):
    out = tmp_path / "out"
    proc = subprocess.Popen(_unmix_cmd(job["stacks"], job["refs"], out), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        _wait_for_first_finished(proc, out / MANIFEST)
        proc.send_signal(signum)
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:  # pragma: no cover - only when the test already failed
            proc.kill()
            proc.wait()
    assert proc.returncode == 130, err
    assert "interrupted" in err and "Traceback" not in err
    done = _check_complete(out)
    assert 1 <= len(done) < N_STACKS, f"{len(done)} stacks finished: the signal did not land mid-run"
    kept = {p: (os.stat(p).st_ino, os.stat(p).st_mtime_ns) for e in done.values() for p in e["outputs"]}

    resumed = subprocess.run(_unmix_cmd(job["stacks"], job["refs"], out, "--resume"), capture_output=True, text=True,
                             timeout=300)
    assert resumed.returncode == 0, resumed.stderr
    status = {row["stack"]: row["status"] for row in json.loads(resumed.stdout)["stacks"]}
    assert {k for k, v in status.items() if v == "skipped (done)"} == set(done)
    assert {k for k, v in status.items() if v == "done"} == {f"s{i}.tif" for i in range(N_STACKS)} - set(done)
    assert {p: (os.stat(p).st_ino, os.stat(p).st_mtime_ns) for p in kept} == kept, "a finished stack was rewritten"

    final = _check_complete(out)
    assert len(final) == N_STACKS
    for i in range(N_STACKS):
        for suffix in (".ome.tif", "_stderr.tif", "_residual.tif"):
            got = tifffile.imread(out / f"s{i}{suffix}")
            want = tifffile.imread(job["reference"] / f"s{i}{suffix}")
            np.testing.assert_array_equal(got, want)
        qc, qc_ref = (json.loads((d / f"s{i}_qc.json").read_text()) for d in (out, job["reference"]))
        for key in ("n_pixels", "n_invalid", "n_saturated", "n_constrained", "mean_abundance", "residual_rms"):
            assert qc[key] == qc_ref[key], key


# --------------------------------------------------------------------------- outputs never overwrite inputs

def _emission_csv(path: Path) -> Path:
    wl = np.arange(640.0, 781.0, 10.0)
    path.write_text("wavelength_nm,dot\n" + "".join(f"{w:g},{np.exp(-0.5 * ((w - 700) / 15) ** 2):.4f}\n" for w in wl))
    return path


def _cases(tmp: Path):
    stack, refs = tmp / "stack.tif", tmp / "references.csv"
    stack.write_bytes((DEMO / "stack.tif").read_bytes())
    refs.write_bytes((DEMO / "references.csv").read_bytes())
    plan, rules = tmp / "plan.toml", tmp / "rules.toml"
    plan.write_bytes((DEMO / "plan.toml").read_bytes())
    rules.write_bytes((DEMO / "rules.toml").read_bytes())
    emission = _emission_csv(tmp / "emission.csv")
    folder = tmp / "stacks"
    folder.mkdir()
    (folder / "s.tif").write_bytes((DEMO / "stack.tif").read_bytes())
    probe = f"CdTe:700@{emission}"
    return {
        "unmix --out STACK": ["unmix", stack, "--references", refs, "--out", stack],
        "unmix --out REFERENCES": ["unmix", stack, "--references", refs, "--out", refs],
        "unmix --out DARK": ["unmix", stack, "--references", refs, "--dark", stack, "--out", stack],
        "unmix FOLDER --out FOLDER": ["unmix", folder, "--references", refs, "--out", folder],
        "plan --out PLAN": ["plan", plan, "--rules", rules, "--out", plan],
        "plan --out RULES": ["plan", plan, "--rules", rules, "--out", rules],
        "depth --csv SPECTRA": ["depth", "--probe", probe, "--filter", "700/30", "--csv", emission],
        "depth --plot SPECTRA": ["depth", "--probe", probe, "--filter", "700/30", "--plot", emission],
        "channels --plot SPECTRA": ["channels", "--probe", probe, "--probe", "CdTe:780", "--filter", "700/30",
                                    "--filter", "780/40", "--plot", emission],
        "demo --out PLAN": ["demo", "--out", plan],
    }


@pytest.mark.parametrize("case", [
    "unmix --out STACK", "unmix --out REFERENCES", "unmix --out DARK", "unmix FOLDER --out FOLDER", "plan --out PLAN",
    "plan --out RULES", "depth --csv SPECTRA", "depth --plot SPECTRA", "channels --plot SPECTRA", "demo --out PLAN"])
def test_no_command_writes_to_an_input(tmp_path, capsys, case):
    argv = _cases(tmp_path)[case]
    before = {p: _sha256(p) for p in tmp_path.rglob("*") if p.is_file()}
    code = main([str(a) for a in argv])
    err = capsys.readouterr().err
    assert code == 2, err
    assert "Traceback" not in err and len(err.strip().splitlines()) <= 3
    after = {p: _sha256(p) for p in tmp_path.rglob("*") if p.is_file()}
    assert after == before, "an input was modified or a file was written"


def test_sigkill_leaves_nothing_that_looks_finished_and_resume_redoes_damaged_outputs(tmp_path, job):
    """SIGKILL gives the run no chance to clean up: only a hidden staging folder may remain.

    Every non-hidden file must belong to a stack the manifest records as done, with matching
    checksums.  An output damaged afterwards (cut short) is not counted as done by --resume: that
    stack is redone, and the staging folder of the killed run is removed.
    """
    out = tmp_path / "out"
    proc = subprocess.Popen(_unmix_cmd(job["stacks"], job["refs"], out), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        _wait_for_first_finished(proc, out / MANIFEST)
        time.sleep(0.3)  # land somewhere inside a later stack
        proc.send_signal(signal.SIGKILL)
        proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:  # pragma: no cover - only when the test already failed
            proc.kill()
            proc.wait()
    assert proc.returncode == -signal.SIGKILL
    hidden = [p.name for p in out.iterdir() if p.name.startswith(".")]
    assert all(name.startswith(".probeplan-partial-") for name in hidden), hidden
    visible = {p.name for p in out.iterdir() if not p.name.startswith(".")}
    entries = json.loads((out / MANIFEST).read_text())["entries"]
    done = {k: e for k, e in entries.items() if e["status"] == "done"}
    assert 1 <= len(done) < N_STACKS
    recorded = {Path(p).name for e in done.values() for p in e["outputs"]} | {MANIFEST}
    assert visible <= recorded, f"files that look finished but are not recorded: {sorted(visible - recorded)}"
    for e in done.values():
        for path, digest in e["outputs"].items():
            assert _sha256(Path(path)) == digest

    damaged_stack = sorted(done)[0]
    damaged = next(Path(p) for p in done[damaged_stack]["outputs"] if p.endswith("_stderr.tif"))
    damaged.write_bytes(damaged.read_bytes()[:1000])

    resumed = subprocess.run(_unmix_cmd(job["stacks"], job["refs"], out, "--resume"), capture_output=True, text=True,
                             timeout=300)
    assert resumed.returncode == 0, resumed.stderr
    status = {row["stack"]: row["status"] for row in json.loads(resumed.stdout)["stacks"]}
    assert status[damaged_stack] == "done", "a damaged output was counted as done"
    assert {k for k, v in status.items() if v == "skipped (done)"} == set(done) - {damaged_stack}
    final = _check_complete(out)  # no hidden file left: the killed run's staging folder is gone
    assert len(final) == N_STACKS
    np.testing.assert_array_equal(tifffile.imread(damaged), tifffile.imread(job["reference"] / damaged.name))
