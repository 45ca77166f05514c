"""``probeplan depth-from-spectrum``: a target's depth from one probe's signal in two or more channels."""

from __future__ import annotations

import argparse

HELP = "estimate a target's depth (per ROI and as a map, with a confidence interval) from one probe's channel ratios"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("stack", help="TIFF/OME-TIFF (C,Y,X) holding one probe (a single-probe image), channels named as "
                                      "the plan's")
    parser.add_argument("--plan", required=True, help="study plan TOML: tissue, source, channels, camera, target size")
    parser.add_argument("--probe", required=True, help="the plan's name of the probe in the stack")
    parser.add_argument("--roi", action="append", default=[], required=True,
                        help="a region: 'name:x0,y0,x1,y1' (pixels, end excluded), 'name:ellipse:cx,cy,rx,ry', "
                             "'name:polygon:x1,y1,x2,y2,...', or an ROI file (.json); repeatable; one must be the "
                             "background")
    parser.add_argument("--roi-background", default="background",
                        help="name of the background ROI, subtracted per channel (default background)")
    parser.add_argument("--out", required=True, help="output folder: depth_rois.csv, depth_map.ome.tif")
    parser.add_argument("--dark", help="dark-frame stack (same shape), subtracted first")
    parser.add_argument("--gain", type=float, default=1.0, help="camera gain, e-/count (default 1), for the shot noise")
    parser.add_argument("--read-noise", type=float, default=0.0, help="camera read noise, e- rms (default 0)")
    parser.add_argument("--min-snr", type=float, default=5.0,
                        help="map only pixels whose brightest channel has at least this SNR (default 5)")
    parser.add_argument("--confidence", type=float, default=0.95, help="confidence level of the interval (default 0.95)")
    parser.add_argument("--json", action="store_true", help="print the ROI estimates as JSON")


def run(args: argparse.Namespace) -> int:
    from pathlib import Path

    import numpy as np

    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.cli.common import model_notes, print_json, print_table
    from probeplan.errors import input_error
    from probeplan.io.atomic import refuse_input_paths, write_csv_atomic
    from probeplan.io.stacks import read_stack, write_stack
    from probeplan.study.depth_spectrum import depth_from_spectrum_image
    from probeplan.study.plan import load_plan
    from probeplan.unmixing.roifile import regions_for_image

    if not 0 < args.confidence < 1:
        raise input_error("--confidence", f"got {args.confidence!r}", "give a level between 0 and 1, e.g. 0.95")
    plan = load_plan(args.plan)
    data, info = read_stack(args.stack)
    data = np.asarray(data, dtype=np.float64)
    if data.ndim != 3:
        raise input_error(args.stack, f"shape {data.shape}", "give a (C, Y, X) stack of one probe")
    if args.dark:
        dark, _ = read_stack(args.dark)
        if dark.shape != data.shape:
            raise input_error(args.dark, f"shape {dark.shape}, stack {data.shape}", "give a dark frame of the stack's shape")
        data = data - dark
    rois, _drawn, labels = regions_for_image(args.roi, data.shape[-2:])
    out = Path(args.out)
    targets = [out / "depth_rois.csv", out / "depth_map.ome.tif"]
    refuse_input_paths(targets, [args.stack, args.plan, *([args.dark] if args.dark else []),
                                 *[r for r in args.roi if r.lower().endswith(".json")]], option="--out")
    with model_notes() as messages:
        result = depth_from_spectrum_image(
            data, plan, args.probe, rois, background=args.roi_background, labels=labels, gain_e_per_count=args.gain,
            read_noise_e=args.read_noise, min_snr=args.min_snr, confidence=args.confidence,
            channel_names=list(info.channel_names) if info.channel_names else None)
    rows, keep = result.rows, result.mapped
    out.mkdir(parents=True, exist_ok=True)
    write_csv_atomic(targets[0], rows)
    write_stack(targets[1], result.depth_map_mm.astype(np.float32), channel_names=["depth_mm", "ci_low_mm", "ci_high_mm"],
                pixel_size_um=info.pixel_size_um)
    notes = list(dict.fromkeys([*result.notes, *messages]))
    if args.json:
        print_json({"caution": RESEARCH_USE_CAUTION, "probe": args.probe, "rois": rows, "mapped_pixels": int(keep.sum()),
                    "notes": notes, "outputs": [str(p) for p in targets]})
        return 0
    print(RESEARCH_USE_CAUTION)
    print_table(rows, ["roi", "depth_mm", "ci_low_mm", "ci_high_mm", "sensitivity_mm_per_percent", "channel_pair", "pixels"])
    print(f"{int(keep.sum())} pixels mapped; confidence {args.confidence:g}; sensitivity: mm of depth per 1 % change "
          "of the channel ratio")
    for n in notes:
        print(f"note: {n}")
    for p in targets:
        print(f"wrote {p}")
    return 0
