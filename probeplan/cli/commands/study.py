"""``probeplan study``: every acquisition of a study unmixed, measured, compared between groups and over time."""

from __future__ import annotations

import argparse

__all__ = ["HELP", "add_arguments", "run"]

HELP = "a whole study: unmix every animal and time point, ROI statistics, group comparisons, kinetics, report"

_LABEL_SUFFIXES = (".tif", ".tiff")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from probeplan.cli.common import add_output_options

    parser.add_argument("study", help="study table CSV: animal,group,time_h,file[,channel] (paths relative to it)")
    refs = parser.add_mutually_exclusive_group(required=True)
    refs.add_argument("--references", help="reference spectra CSV: channel,<component>,...")
    refs.add_argument("--control", action="append", metavar="NAME=STACK",
                      help="measure component NAME's spectrum from a single-probe control stack (repeatable; "
                           "needs --unlabelled)")
    parser.add_argument("--unlabelled", metavar="STACK", help="unlabelled control stack, subtracted from each --control")
    parser.add_argument("--unlabelled-as", metavar="NAME", default=None,
                        help="also unmix the unlabelled control's spectrum as component NAME (e.g. autofluorescence)")
    parser.add_argument("--out", required=True, help="output folder (created; a rerun resumes where it stopped)")
    parser.add_argument("--method", choices=("nnls", "ls", "wls"), default="nnls",
                        help="unmixing of the maps written (ROI means are always unconstrained least squares)")
    parser.add_argument("--roi", action="append", default=[],
                        help="ROI 'name:x0,y0,x1,y1' (pixels, end excluded), 'name:ellipse:cx,cy,rx,ry', "
                             "'name:polygon:x1,y1,x2,y2,...', an ROI file (.json) or a label TIFF; repeatable")
    parser.add_argument("--roi-background", default=None,
                        help="name of the background ROI (default: the ROI file's background, else background)")
    parser.add_argument("--rois", default=None, metavar="FILE",
                        help="ROI file (JSON: saved from the page, or DIR/rois.json of an earlier run) with rectangles, "
                             "ellipses, polygons, named labels")
    parser.add_argument("--auto-roi", action="append", default=[], metavar="NAME=COMPONENT",
                        help="an ROI per acquisition: pixels of COMPONENT's map above Otsu's threshold; repeatable")
    parser.add_argument("--dark", help="dark-frame stack, subtracted (channels matched by name)")
    parser.add_argument("--flat", help="flat-field stack, divided (channels matched by name)")
    parser.add_argument("--channel-axis", type=int, default=None,
                        help="axis holding the channels in files that do not name their axes (2 for Y,X,C)")
    parser.add_argument("--gain", type=float, default=1.0, help="camera gain, e-/count, for the error maps (default 1)")
    parser.add_argument("--read-noise", type=float, default=0.0, help="camera read noise, e- rms (default 0)")
    parser.add_argument("--abundance-unit", default=None, metavar="UNIT",
                        help="use the references as written (e.g. counts per µM) and call the abundance unit UNIT "
                             "(e.g. uM); default: references scaled to sum 1, abundance in counts")
    parser.add_argument("--plan", default=None,
                        help="study plan TOML: its assumed effect size beside the observed, and the plan's predictions "
                             "beside the measurements (closure.csv, closure_fits.csv, refined_plan.toml)")
    parser.add_argument("--calibration", default=None, metavar="FILE",
                        help="calibration.csv from 'probeplan calibrate': also write measurements_uM.csv (µM with "
                             "standard errors and range flags)")
    parser.add_argument("--depth-mm", type=float, default=None,
                        help="the target's depth (mm): checked against the calibration phantom's depth (default: the "
                             "plan's target depth) and used by the closure when given")
    parser.add_argument("--no-maps", action="store_true", help="write only the tables, not the maps of each acquisition")
    parser.add_argument("--memory-mb", type=float, default=None,
                        help="working-memory bound in MiB for one acquisition, read and written by blocks of rows "
                             "(default 256)")
    parser.add_argument("--scheduler", default=None, metavar="ADDRESS",
                        help="dask scheduler address (e.g. tcp://host:8786): one task per acquisition on its workers, "
                             "which must see the input and output folders")
    parser.add_argument("--json", action="store_true", help="print a machine-readable summary")
    add_output_options(parser)


def run(args: argparse.Namespace) -> int:
    import math
    import signal
    import sys
    from pathlib import Path

    from tqdm import tqdm

    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.cli.common import print_json
    from probeplan.errors import input_error
    from probeplan.study.runs import StudySettings, run_study
    from probeplan.study.table import read_study_table

    for name in ("gain", "read_noise"):
        v = getattr(args, name)
        if not (math.isfinite(v) and (v > 0 if name == "gain" else v >= 0)):
            raise input_error(f"--{name.replace('_', '-')}", f"got {v}", "give a finite positive value")
    from probeplan.unmixing.roifile import background_name, read_roi_file

    labels = [r for r in args.roi if r.lower().endswith(_LABEL_SUFFIXES)]
    roi_files = [r for r in args.roi if r.lower().endswith(".json")] + ([args.rois] if args.rois else [])
    rects = [r for r in args.roi if not r.lower().endswith((*_LABEL_SUFFIXES, ".json"))]
    if len(labels) > 1:
        raise input_error("--roi", f"{len(labels)} label images given", "give at most one label TIFF")
    if len(roi_files) > 1:
        raise input_error("--rois", f"{len(roi_files)} ROI files given", "give one ROI file (it holds every region)")
    args.roi_background = background_name(roi_files, args.roi_background)
    file_names = [r.name for r in read_roi_file(roi_files[0]).regions] if roi_files else []
    planned = None
    if args.plan:
        from probeplan.study.plan import load_plan

        plan = load_plan(args.plan)
        if plan.statistics:
            planned = {"effect_size": plan.statistics["effect_size"], "sd": plan.statistics["sd"]}
    if args.depth_mm is not None and not (math.isfinite(args.depth_mm) and args.depth_mm >= 0):
        raise input_error("--depth-mm", f"got {args.depth_mm}", "give the target's depth in mm (>= 0)")
    calibration = None
    if args.calibration:
        from probeplan.study.calibration import read_calibration_csv

        calibration = read_calibration_csv(args.calibration)
    if args.plan or calibration is not None:
        from probeplan.study.runs import load_references

        comps = set(load_references(args.references, unit=args.abundance_unit).component_names)
        if calibration is not None and not set(calibration.table["component"]) & comps:
            raise input_error(args.calibration, f"calibrates {list(calibration.table['component'])}, none of the "
                              f"references' components {sorted(comps)}", "use the calibration made with these probes")
        if args.plan:
            missing = [p["name"] for p in plan.probes if p["name"] not in comps]
            if missing:
                raise input_error(args.references, f"no column for the plan's probe(s) {missing}",
                                  "name the reference columns as the plan names its probes")
            if args.roi_background not in [r.split(":")[0].strip() for r in rects] + file_names and not labels:
                raise input_error("--roi", f"no background ROI {args.roi_background!r}",
                                  "the closure with --plan compares target and background ROIs: add one")
    settings = StudySettings(
        method=args.method, rois=tuple(rects), labels_path=Path(labels[0]) if labels else None,
        roi_background=args.roi_background, dark_path=Path(args.dark) if args.dark else None,
        flat_path=Path(args.flat) if args.flat else None, channel_axis=args.channel_axis,
        gain_e_per_count=args.gain, read_noise_e=args.read_noise, write_maps=not args.no_maps,
        roi_file=Path(roi_files[0]) if roi_files else None, auto_rois=tuple(args.auto_roi),
        **({"memory_limit_mb": args.memory_mb} if args.memory_mb is not None else {}),
    )
    references = args.references
    if args.control:
        from probeplan.unmixing.references import parse_control_specs, references_from_control_files

        if not args.unlabelled:
            raise input_error("--control", "needs --unlabelled", "give the unlabelled control stack with --unlabelled")
        references = references_from_control_files(parse_control_specs(args.control), args.unlabelled,
                                                   normalise=None if args.abundance_unit else "sum",
                                                   unlabelled_name=args.unlabelled_as)
    elif args.unlabelled:
        raise input_error("--unlabelled", "is used only with --control", "add --control NAME=STACK or drop --unlabelled")
    n_acq = len(read_study_table(args.study))
    out = Path(args.out)
    created = None
    for parent in (out, *out.absolute().parents):
        if parent.exists():
            break
        created = parent

    def _terminate(signum, frame):
        raise KeyboardInterrupt

    client = None
    if args.scheduler is not None:
        from probeplan.unmixing.cluster import connect

        client = connect(args.scheduler)  # bounded wait: a one-line error before anything is written
    previous = signal.signal(signal.SIGTERM, _terminate)
    bar = tqdm(total=n_acq, desc="study", unit="acquisition", disable=True if args.json else None, file=sys.stderr,
               leave=False)
    try:
        result = run_study(args.study, references, out_dir=out, settings=settings, unit=args.abundance_unit,
                           planned_effect=planned, progress=lambda acq, status: bar.update(1), scheduler=client)
        if args.control:
            from probeplan.unmixing.references import write_references_csv

            result.outputs["references"] = write_references_csv(out / "references_from_controls.csv", references)
        from probeplan.report.study import study_report, write_study_report

        report_path = write_study_report(study_report(result, settings), out)
        extra = _closure_and_calibration(args, result, out, calibration)
    except BaseException:
        # nothing finished: leave no folder behind (finished acquisitions are kept for the rerun to reuse)
        if created is not None and not any(out.glob("acquisitions/*_measurements.csv")):
            import shutil

            shutil.rmtree(created, ignore_errors=True)
        raise
    finally:
        bar.close()
        signal.signal(signal.SIGTERM, previous)
        if client is not None:
            client.close()
    g = result.groups
    n_compared = int(g["p_welch"].notna().sum()) if len(g) else 0
    summary = {
        "caution": RESEARCH_USE_CAUTION, "acquisitions": len(result.acquisitions),
        "animals": int(result.measurements["animal"].nunique()), "groups": sorted(result.measurements["group"].unique()),
        "time_points_h": sorted(float(t) for t in result.measurements["time_h"].unique()),
        "resumed": result.skipped, "unit": result.unit, "comparisons": len(g), "comparisons_tested": n_compared,
        "significant_holm_0.05": int((g["p_adjusted"] < 0.05).sum()) if len(g) else 0,
        "outputs": {k: str(v) for k, v in {**result.outputs, "report": report_path, **extra["outputs"]}.items()},
        "notes": result.notes + extra["notes"],
    }
    if args.json:
        print_json(summary)
    else:
        out_ = sys.stdout.write
        out_(f"{summary['acquisitions']} acquisitions ({summary['animals']} animals, groups "
             f"{', '.join(summary['groups'])}, time points {', '.join(f'{t:g}' for t in summary['time_points_h'])} h)"
             + (f"; {len(result.skipped)} unchanged since the last run, reused" if result.skipped else "") + "\n")
        out_(f"abundance unit: {result.unit}\n")
        out_(f"{summary['comparisons']} group comparisons, {n_compared} tested, "
             f"{summary['significant_holm_0.05']} with Holm-adjusted p < 0.05\n")
        for note in result.notes[1:] + extra["notes"]:
            out_(f"note: {note}\n")
        for k, v in summary["outputs"].items():
            out_(f"{k}: {v}\n")
        out_(RESEARCH_USE_CAUTION + "\n")
    return 0


def _closure_and_calibration(args, result, out, calibration) -> dict:
    """measurements_uM.csv (with --calibration) and closure tables and the refined plan (with --plan)."""
    from probeplan.cli.common import model_notes
    from probeplan.io.atomic import write_text_atomic

    outputs, notes = {}, []
    plan = None
    if args.plan:
        from probeplan.study.plan import load_plan

        plan = load_plan(args.plan)
    depth = args.depth_mm if args.depth_mm is not None else (plan.target["depth_mm"] if plan is not None else None)
    with model_notes() as messages:
        if calibration is not None:
            from probeplan.study.calibration import calibrate_measurements

            table = calibrate_measurements(result.measurements, calibration, depth_mm=depth)
            outputs["measurements_uM"] = out / "measurements_uM.csv"
            write_text_atomic(outputs["measurements_uM"], table.to_csv(index=False))
        if plan is not None:
            from probeplan.study.closure import closure
            from probeplan.study.runs import load_references

            c = closure(result.measurements, plan, load_references(args.references, unit=args.abundance_unit),
                        background_roi=args.roi_background, depth_mm=args.depth_mm, gain_e_per_count=args.gain)
            for key, name, text in (("closure", "closure.csv", c.table.to_csv(index=False)),
                                    ("closure_fits", "closure_fits.csv", c.fits.to_csv(index=False)),
                                    ("refined_plan", "refined_plan.toml", c.refined_plan_toml)):
                outputs[key] = out / name
                write_text_atomic(outputs[key], text)
            notes += c.notes
    return {"outputs": outputs, "notes": list(dict.fromkeys(notes + messages))}
