"""``probeplan unmix``: separate the probes in image stacks (one file or a folder of stacks)."""

from __future__ import annotations

import argparse

__all__ = ["HELP", "add_arguments", "run", "MANIFEST_NAME"]

HELP = "unmix image stacks into probe abundance maps with standard errors, residuals, QC and overlay"

#: Manifest of finished stacks (checksums) in the output folder, used by --resume.
MANIFEST_NAME = "probeplan_unmix_manifest.json"
_STACK_SUFFIXES = (".tif", ".tiff")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from probeplan.cli.common import add_output_options

    parser.add_argument("stack", help="TIFF/OME-TIFF stack (C,Y,X), (C,Z,Y,X), (T,C,Y,X) or Y,X,C with --channel-axis 2, "
                                      "an OME-Zarr image, or a folder of TIFF stacks")
    refs = parser.add_mutually_exclusive_group(required=True)
    refs.add_argument("--references", help="reference spectra CSV: channel,<component>,...")
    refs.add_argument("--references-from-plan", metavar="PLAN",
                      help="predict the reference spectra from a study plan's probes and channels at its target depth")
    refs.add_argument("--control", action="append", metavar="NAME=STACK",
                      help="measure component NAME's spectrum from a single-probe control stack (repeatable; "
                           "needs --unlabelled)")
    parser.add_argument("--unlabelled", metavar="STACK",
                        help="unlabelled control stack (no probe), subtracted from each --control")
    parser.add_argument("--unlabelled-as", metavar="NAME", default=None,
                        help="also unmix the unlabelled control's spectrum as component NAME (e.g. autofluorescence)")
    parser.add_argument("--out", required=True, help="abundance OME-TIFF to write, or OME-Zarr when it ends .ome.zarr "
                                                     "(a folder when STACK is a folder)")
    parser.add_argument("--method", choices=("nnls", "ls", "wls"), default="nnls",
                        help="nnls: exact non-negative LS (default); ls: unconstrained; wls: Poisson-weighted LS")
    parser.add_argument("--channel-axis", type=int, default=None,
                        help="axis holding the channels, when the file does not say")
    parser.add_argument("--dark", help="dark-frame stack (same shape), subtracted")
    parser.add_argument("--flat", help="flat-field stack (same shape), divided")
    parser.add_argument("--offset", action="store_true", help="add a constant offset component")
    parser.add_argument("--saturation", type=float, default=None,
                        help="camera full scale in counts (default: the integer type's maximum)")
    parser.add_argument("--gain", type=float, default=1.0, help="camera gain, e-/count (default 1)")
    parser.add_argument("--read-noise", type=float, default=0.0, help="camera read noise, e- rms (default 0)")
    parser.add_argument("--roi", action="append", default=[],
                        help="ROI 'name:x0,y0,x1,y1' (pixels, end excluded), 'name:ellipse:cx,cy,rx,ry', "
                             "'name:polygon:x1,y1,x2,y2,...', an ROI file (.json, e.g. saved from the page) or a "
                             "label TIFF; repeatable")
    parser.add_argument("--roi-background", default=None,
                        help="name of the background ROI (default: the ROI file's background, else background)")
    parser.add_argument("--memory-mb", type=float, default=None, help="working-memory bound in MiB (default 256)")
    parser.add_argument("--scheduler", default=None, help="address of a running dask.distributed scheduler")
    parser.add_argument("--resume", action="store_true",
                        help="skip stacks already done (checked by checksums) and redo the others, replacing the "
                             "outputs the manifest records for them")
    parser.add_argument("--calibration", metavar="FILE",
                        help="calibration.csv from 'probeplan calibrate': also write the maps in uM with standard "
                             "errors and range flags (<stem>_uM*.ome.tif, <stem>_uM_roi.csv)")
    parser.add_argument("--depth-mm", type=float, default=None,
                        help="depth of the target (mm), checked against the calibration phantom's depth")
    add_output_options(parser)
    parser.add_argument("--json", action="store_true", help="print a machine-readable summary")


def _stem(name: str) -> str:
    """The file name without its image extension only: ``mouse1.day3.ome.tif`` -> ``mouse1.day3``."""
    for ext in (".ome.tiff", ".ome.tif", ".tiff", ".tif"):
        if name.lower().endswith(ext):
            return name[: -len(ext)]
    return name


def _sha256(path) -> str:
    from probeplan.io.atomic import file_sha256

    return file_sha256(path)


def _settings_digest(args, refs) -> str:
    import hashlib
    import json

    settings = {
        "method": args.method, "channel_axis": args.channel_axis, "offset": args.offset,
        "saturation": args.saturation, "gain": args.gain, "read_noise": args.read_noise, "roi": args.roi,
        "roi_files": {r: _sha256(r) for r in args.roi if r.lower().endswith(".json")},
        "roi_background": args.roi_background, "components": list(refs.component_names),
        "channels": list(refs.channel_names or []), "matrix": refs.matrix.tolist(),
        "dark": _sha256(args.dark) if args.dark else None, "flat": _sha256(args.flat) if args.flat else None,
    }
    if getattr(args, "calibration", None):
        settings.update(calibration=_sha256(args.calibration), depth_mm=args.depth_mm)
    return hashlib.sha256(json.dumps(settings, sort_keys=True).encode()).hexdigest()


def _load_manifest(path) -> dict:
    import json

    from probeplan.errors import input_error

    if not path.exists():
        return {"entries": {}}
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        if not isinstance(data, dict) or not isinstance(data.get("entries"), dict):
            raise ValueError("no 'entries'")
        return data
    except (ValueError, OSError) as exc:
        raise input_error(str(path), f"is not a valid manifest ({exc})", "delete it and run again without --resume") from None


def _read_manifest_leniently(path) -> dict:
    """The manifest to add an entry to: a damaged one is started afresh (it is only a record)."""
    try:
        return _load_manifest(path)
    except ValueError:
        return {"entries": {}}


def _record(manifest_path, key: str, entry: dict) -> None:
    """Add one stack's entry to the folder's manifest, under a lock: concurrent runs keep every entry."""
    from probeplan.io.atomic import update_json_file

    def add(manifest: dict) -> dict:
        manifest["entries"][key] = entry
        return manifest

    update_json_file(manifest_path, add, read=_read_manifest_leniently)


def _is_done(entry, stack, settings) -> bool:
    from pathlib import Path

    if not isinstance(entry, dict) or not isinstance(entry.get("outputs"), dict) or entry.get("status") != "done":
        return False
    if entry.get("settings_sha256") != settings or entry.get("input_sha256") != _sha256(stack):
        return False
    for p, digest in entry["outputs"].items():
        if not isinstance(digest, str) or not Path(p).exists() or _sha256(p) != digest:
            return False
    return True


def _recorded_outputs(manifest: dict) -> list:
    """Every output path the manifest names (finished or being written when a run stopped)."""
    out = []
    for entry in manifest.get("entries", {}).values():
        if isinstance(entry, dict) and isinstance(entry.get("outputs"), dict):
            out += [str(p) for p in entry["outputs"]]
    return out


def _summary_row(key, qc, outputs, seconds) -> dict:
    return {
        "stack": key, "status": "done", "pixels": qc["n_pixels"],
        "constrained": round(qc["fraction_constrained"], 4), "saturated": qc["n_saturated"],
        "invalid": qc["n_invalid"], "residual_rms": qc["residual_rms"]["rms"],
        "seconds": round(seconds, 2), "outputs": {k: str(v) for k, v in outputs.items()},
        "condition_number": qc["condition_number"], "mean_abundance": qc["mean_abundance"],
    }


def _stack_task(job: dict) -> dict:
    """One stack of a folder on a cluster worker, as the local loop does it.

    Inside the run's overwrite rule (``overwrite``, ``replaceable``) the worker unmixes its
    stack into a staged group, records it in the folder's manifest as being written, moves the
    group into place and records it as done (the manifest is updated under its lock, so
    workers writing at once keep every entry).  Only the QC summary and the output paths
    travel back.
    """
    from probeplan.io.atomic import output_batch, output_policy, readable_path
    from probeplan.unmixing.pipeline import unmix_file

    args = dict(job)
    key, manifest_path, settings = args.pop("key"), args.pop("manifest_path"), args.pop("settings")
    overwrite, replaceable = args.pop("overwrite"), args.pop("replaceable")
    stack = args.pop("stack_path")
    with output_policy(overwrite=overwrite, replaceable=replaceable), output_batch() as batch:
        result = unmix_file(stack, args.pop("references"), args.pop("out_path"), **args)
        digests = {str(p): _sha256(readable_path(p)) for p in result.outputs.values()}
        _record(manifest_path, key, {"status": "writing", "outputs": dict.fromkeys(digests)})
        batch.commit()
        _record(manifest_path, key, {"status": "done", "input_sha256": _sha256(stack),
                                     "settings_sha256": settings, "outputs": digests})
    return {"qc": result.qc, "outputs": {k: str(v) for k, v in result.outputs.items()}}


def _run_folder_on_cluster(client, args, refs, targets, manifest, manifest_path, settings, all_inputs, rect_rois,
                           label_files, summary) -> None:
    # one task per stack: each worker reads its stack and writes its outputs; the client keeps
    # the small results (QC, output paths) as they arrive
    import time

    from probeplan.io.atomic import current_policy
    from probeplan.unmixing.cluster import absolute_location, run_tasks
    from probeplan.unmixing.pipeline import DEFAULT_MEMORY_MB

    def absolute(p):
        return None if p is None else absolute_location(p)

    policy = current_policy()
    replaceable = sorted(str(p) for p in policy.replaceable) if policy is not None else []
    jobs, keys = [], []
    for s, target in targets:
        if args.resume and _is_done(manifest["entries"].get(s.name), s, settings):
            summary.append({"stack": s.name, "status": "skipped (done)", "pixels": "", "constrained": "",
                            "saturated": "", "invalid": "", "residual_rms": "", "seconds": 0.0})
            continue
        keys.append(s.name)
        jobs.append({
            "key": s.name, "manifest_path": absolute(manifest_path), "settings": settings,
            "overwrite": bool(policy is not None and policy.overwrite), "replaceable": replaceable,
            "stack_path": absolute(s), "references": refs, "out_path": absolute(target), "method": args.method,
            "channel_axis": args.channel_axis, "dark_path": absolute(args.dark), "flat_path": absolute(args.flat),
            "offset": args.offset, "saturation": args.saturation, "gain_e_per_count": args.gain,
            "read_noise_e": args.read_noise,
            "rois": [absolute(r) if r.lower().endswith(".json") else r for r in rect_rois],  # ROI files too
            "labels_path": absolute(label_files[0]) if label_files else None, "roi_background": args.roi_background,
            "memory_limit_mb": args.memory_mb if args.memory_mb is not None else DEFAULT_MEMORY_MB,
            "extra_inputs": [absolute(p) for p in all_inputs],
        })
    t0 = time.perf_counter()

    def record(i, res):
        summary.append(_summary_row(keys[i], res["qc"], res["outputs"], time.perf_counter() - t0))

    first = len(summary)
    run_tasks(client, _stack_task, jobs, on_result=record)
    summary[first:] = sorted(summary[first:], key=lambda row: row["stack"])


def run(args: argparse.Namespace) -> int:
    import signal
    import sys
    import time
    from pathlib import Path

    from tqdm import tqdm

    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.cli.common import print_json, print_table
    from probeplan.errors import input_error
    from probeplan.io.atomic import current_policy, output_batch, readable_path, signals_held
    from probeplan.io.ngff import is_url
    from probeplan.io.stacks import open_stack
    from probeplan.unmixing.pipeline import DEFAULT_MEMORY_MB, unmix_file
    from probeplan.unmixing.references import read_references_csv

    if is_url(args.stack):
        raise input_error(args.stack, "is a URL; 'unmix' reads local or shared paths",
                          "give a path this machine (and every worker) can read, or name the OME-Zarr image's URL in a "
                          "study table ('probeplan study') or read it from Python (probeplan.unmix)")
    stack = Path(args.stack)
    out = Path(args.out)
    created = None
    if args.references_from_plan:
        from probeplan.study.evaluate import plan_references
        from probeplan.study.plan import load_plan

        refs = plan_references(load_plan(args.references_from_plan))
        args.references = args.references_from_plan
    elif args.control:
        from probeplan.unmixing.references import parse_control_specs, references_from_control_files

        if not args.unlabelled:
            raise input_error("--control", "needs --unlabelled", "give the unlabelled control stack with --unlabelled")
        controls = parse_control_specs(args.control)
        refs = references_from_control_files(controls, args.unlabelled, unlabelled_name=args.unlabelled_as)
        args.references = args.unlabelled
    else:
        refs = read_references_csv(args.references)
    if args.unlabelled and not args.control:
        raise input_error("--unlabelled", "is used only with --control", "add --control NAME=STACK or drop --unlabelled")
    calibration = None
    if args.calibration:
        from probeplan.study.calibration import read_calibration_csv

        calibration = read_calibration_csv(args.calibration)
        if not set(calibration.table["component"]) & set(refs.component_names):
            raise input_error(args.calibration, f"calibrates {list(calibration.table['component'])}, none of the "
                              f"references' components {list(refs.component_names)}",
                              "use the calibration made with these probes (the names must match)")
    rect_rois = [r for r in args.roi if not r.lower().endswith(_STACK_SUFFIXES)]
    from probeplan.unmixing.roifile import background_name

    args.roi_background = background_name(rect_rois, args.roi_background)
    label_files = [r for r in args.roi if r.lower().endswith(_STACK_SUFFIXES)]
    if len(label_files) > 1:
        raise input_error("--roi", f"{len(label_files)} label images given", "give at most one label TIFF")
    from probeplan.io.ngff import is_ome_zarr

    if stack.is_dir() and not is_ome_zarr(stack):
        stacks = sorted(p for p in stack.iterdir() if p.is_file() and p.suffix.lower() in _STACK_SUFFIXES)
        if not stacks:
            raise input_error(str(stack), "holds no .tif/.tiff stack", "give a folder of TIFF stacks or one stack file")
        if out.exists() and not out.is_dir():
            raise input_error("--out", f"{str(out)!r} is a file but STACK is a folder", "give an output folder")
        if out.resolve() == stack.resolve():
            raise input_error("--out", f"{str(out)!r} is the input folder", "give a separate output folder")
        targets = [(s, out / (_stem(s.name) + ".ome.tif")) for s in stacks]
        by_target: dict = {}
        for s, t in targets:
            if t in by_target:
                raise input_error(str(stack), f"{by_target[t].name!r} and {s.name!r} would both be written to {t.name!r}",
                                  "rename one of them (names must differ once '.ome.tif'/'.tif' is removed)")
            by_target[t] = s
        # The outermost folder this command creates, removed again if no stack is finished.
        for parent in (out, *out.absolute().parents):
            if parent.exists():
                break
            created = parent
        folder = out
    else:
        if not stack.exists():
            raise input_error(str(stack), "file not found", "give an existing TIFF stack or folder")
        if out.is_dir():
            raise input_error("--out", f"{str(out)!r} is a folder but STACK is a file", "give the abundance file name")
        targets = [(stack, out)]
        folder = out.parent if str(out.parent) else Path(".")
        if not folder.is_dir():
            raise input_error("--out", f"folder {str(folder)!r} does not exist", "create it first or choose another --out")
    manifest_path = folder / MANIFEST_NAME
    try:
        manifest = _load_manifest(manifest_path)
    except ValueError:
        if args.resume:
            raise
        manifest = {"entries": {}}
    for option, p in (("--dark", args.dark), ("--flat", args.flat)):
        if p and not Path(p).is_file():
            raise input_error(str(p), "file not found", f"give an existing TIFF stack to {option}")
    settings = _settings_digest(args, refs)
    policy = current_policy()
    if args.resume and policy is not None:
        # outputs an earlier run of this folder recorded (done, damaged or cut short) may be redone
        policy.allow(_recorded_outputs(manifest))
    all_inputs = [s for s, _ in targets] + [args.references] + ([args.dark] if args.dark else []) + (
        [args.flat] if args.flat else []) + label_files + ([args.calibration] if args.calibration else [])

    def _terminate(signum, frame):
        raise KeyboardInterrupt

    summary = []
    calibration_notes: list[str] = []
    calibration_flags: dict = {}
    client = None
    if args.scheduler is not None:
        from probeplan.unmixing.cluster import connect

        client = connect(args.scheduler)  # bounded wait: a one-line error, nothing written
    if created is not None:
        out.mkdir(parents=True, exist_ok=True)
    if args.control:
        from probeplan.unmixing.references import write_references_csv

        derived = folder / (("references_from_controls.csv") if stack.is_dir() else
                            (out.name.split(".ome.")[0].split(".tif")[0] + "_references.csv"))
        write_references_csv(derived, refs)
    previous = signal.signal(signal.SIGTERM, _terminate)
    run_batch = None
    try:
        if client is not None and len(targets) > 1 and calibration is None:
            # one task per stack (with --calibration: one task per block, stack after stack, so that the
            # calibrated maps are made here from the finished outputs)
            _run_folder_on_cluster(client, args, refs, targets, manifest, manifest_path, settings, all_inputs,
                                   rect_rois, label_files, summary)
            targets = []
        with output_batch() as run_batch:  # the run's batch; each stack is committed in turn
            for s, target in targets:
                key = s.name
                t0 = time.perf_counter()
                if args.resume and _is_done(manifest["entries"].get(key), s, settings):
                    summary.append({"stack": key, "status": "skipped (done)", "pixels": "", "constrained": "",
                                    "saturated": "", "invalid": "", "residual_rms": "", "seconds": 0.0})
                    continue
                with open_stack(s, channel_axis=args.channel_axis) as r:
                    n_rows = r.info.n_rows
                with output_batch() as batch:
                    with tqdm(total=n_rows, desc=key, unit="row", disable=None if not args.json else True,
                              file=sys.stderr, leave=False) as bar:
                        result = unmix_file(
                            s, refs, target, method=args.method, channel_axis=args.channel_axis, dark_path=args.dark,
                            flat_path=args.flat, offset=args.offset, saturation=args.saturation,
                            gain_e_per_count=args.gain, read_noise_e=args.read_noise, rois=rect_rois,
                            labels_path=label_files[0] if label_files else None, roi_background=args.roi_background,
                            memory_limit_mb=args.memory_mb if args.memory_mb is not None else DEFAULT_MEMORY_MB,
                            scheduler=client, extra_inputs=all_inputs, progress=bar.update,
                        )
                    if calibration is not None:
                        from probeplan.cli.common import model_notes
                        from probeplan.study.calibration import calibrate_outputs

                        with model_notes() as cal_notes:
                            cal = calibrate_outputs(result.outputs, calibration, depth_mm=args.depth_mm, rois=rect_rois,
                                                    background=args.roi_background)
                        result.outputs.update({k: v for k, v in cal.items() if k.startswith("uM")})
                        calibration_notes.extend(cal_notes)
                        calibration_flags[key] = cal["n_flagged"]
                    digests = {str(p): _sha256(readable_path(p)) for p in result.outputs.values()}
                    # recorded as being written first: a run killed while moving the files in leaves an
                    # entry that --resume redoes (and whose files it may replace), never one it skips
                    _record(manifest_path, key, {"status": "writing", "outputs": dict.fromkeys(digests)})
                    with signals_held():  # an interrupt waits until the stack is moved in and recorded as done
                        batch.commit()
                        _record(manifest_path, key, {"status": "done", "input_sha256": _sha256(s),
                                                     "settings_sha256": settings, "outputs": digests})
                summary.append(_summary_row(key, result.qc, result.outputs, time.perf_counter() - t0))
    except BaseException:
        # remove a folder this command created unless some stack was moved into it (on a cluster
        # the workers move their stacks in: once one recorded a stack in the manifest, it stays)
        moved_in = (run_batch is not None and run_batch.committed) or (client is not None and manifest_path.exists())
        if created is not None and not moved_in:
            import shutil

            shutil.rmtree(created, ignore_errors=True)
        raise
    finally:
        signal.signal(signal.SIGTERM, previous)
        if client is not None:
            client.close()
    if args.json:
        extra = {}
        if calibration is not None:
            extra = {"calibration": str(args.calibration), "unit": "uM", "pixels_by_flag": calibration_flags,
                     "notes": list(dict.fromkeys(calibration_notes))}
        print_json({"caution": RESEARCH_USE_CAUTION, "method": args.method, "components": list(refs.component_names),
                    "stacks": summary, "manifest": str(manifest_path), **extra})
    else:
        print_table(summary, ["stack", "status", "pixels", "constrained", "saturated", "invalid", "residual_rms", "seconds"])
        for row in summary:
            if row["status"] == "done":
                sys.stdout.write(f"{row['stack']}: {', '.join(str(p) for p in row['outputs'].values())}\n")
        if calibration is not None:
            sys.stdout.write("calibrated maps in uM (abundance files stay in counts); pixels by range flag: "
                             + "; ".join(f"{k}: {v}" for k, v in calibration_flags.items()) + "\n")
            for n in dict.fromkeys(calibration_notes):
                sys.stdout.write(f"note: {n}\n")
        sys.stdout.write(RESEARCH_USE_CAUTION + "\n")
    return 0
