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
                        help="ROI 'name:x0,y0,x1,y1' (pixels, end excluded); repeatable; one must be the background")
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
    from probeplan.errors import input_error, positive_number
    from probeplan.io.atomic import refuse_input_paths, write_csv_atomic
    from probeplan.io.stacks import read_stack, write_stack
    from probeplan.study.depth_spectrum import depth_from_spectrum_plan
    from probeplan.study.plan import load_plan
    from probeplan.unmixing.roi import parse_rectangle

    gain = positive_number("--gain", args.gain)
    read_noise = positive_number("--read-noise", args.read_noise, allow_zero=True)
    min_snr = positive_number("--min-snr", args.min_snr, allow_zero=True)
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
    rois = [parse_rectangle(r, shape=data.shape[-2:]) for r in args.roi]
    names = [r.name for r in rois]
    if args.roi_background not in names:
        raise input_error("--roi", f"no ROI named {args.roi_background!r} (given {names})",
                          "add the background ROI, e.g. --roi background:0,0,20,20")

    def _mean(roi):
        x0, y0, x1, y1 = roi.rect
        return data[:, y0:y1, x0:x1].reshape(data.shape[0], -1).mean(axis=1), (y1 - y0) * (x1 - x0)

    bg, _ = _mean(rois[names.index(args.roi_background)])
    signal = data - bg[:, None, None]
    variance = np.maximum(data, 1.0) / gain + (read_noise / gain) ** 2  # shot + read noise, in counts
    se_map = np.sqrt(variance)
    out = Path(args.out)
    targets = [out / "depth_rois.csv", out / "depth_map.ome.tif"]
    refuse_input_paths(targets, [args.stack, args.plan] + ([args.dark] if args.dark else []), option="--out")
    channel_names = list(info.channel_names) if info.channel_names else None
    rows = []
    with model_notes() as messages:
        for roi in rois:
            if roi.name == args.roi_background:
                continue
            x0, y0, x1, y1 = roi.rect
            s = signal[:, y0:y1, x0:x1].reshape(data.shape[0], -1)
            v = variance[:, y0:y1, x0:x1].reshape(data.shape[0], -1)
            est = depth_from_spectrum_plan(s.mean(axis=1), plan, args.probe, signal_se=np.sqrt(v.mean(axis=1) / s.shape[1]),
                                           confidence=args.confidence, channel_names=channel_names)
            rows.append({"roi": roi.name, "depth_mm": float(est.depth_mm), "ci_low_mm": float(est.ci_low_mm),
                         "ci_high_mm": float(est.ci_high_mm), "confidence": args.confidence,
                         "sensitivity_mm_per_percent": float(est.sensitivity_mm_per_percent),
                         "channel_pair": "/".join(est.channel_pair), "pixels": int(s.shape[1])})
        keep = (signal / se_map).max(axis=0) >= min_snr
        masked = np.where(keep[None], signal, np.nan)
        est_map = depth_from_spectrum_plan(np.where(np.isnan(masked), 0.0, masked), plan, args.probe, signal_se=se_map,
                                           confidence=args.confidence, channel_names=channel_names)
    depth_map = np.stack([np.where(keep, m, np.nan) for m in (est_map.depth_mm, est_map.ci_low_mm, est_map.ci_high_mm)])
    out.mkdir(parents=True, exist_ok=True)
    write_csv_atomic(targets[0], rows)
    write_stack(targets[1], depth_map.astype(np.float32), channel_names=["depth_mm", "ci_low_mm", "ci_high_mm"],
                pixel_size_um=info.pixel_size_um)
    notes = list(dict.fromkeys([*est_map.notes, *messages,
                                "background subtracted per channel from the background ROI; pixels below the SNR "
                                f"threshold {min_snr:g} left empty (NaN) in the map"]))
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
