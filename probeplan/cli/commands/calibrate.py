"""``probeplan calibrate``: calibration lines (abundance counts against µM) from a phantom of known concentrations."""

from __future__ import annotations

import argparse

HELP = "fit abundance against concentration from a phantom (weighted, with intercept); LOD, r2, calibrated range"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from probeplan.cli.common import add_output_options

    parser.add_argument("phantom", help="PHANTOM.csv: file, component, concentration_uM, roi (\"x0,y0,x1,y1\"), blanks at 0")
    parser.add_argument("--references", required=True, help="reference spectra CSV: channel,<component>,...")
    parser.add_argument("--out", required=True, help="output folder (calibration.csv, calibration_points.csv, calibration.png)")
    parser.add_argument("--depth-mm", type=float, required=True,
                        help="depth of the wells below the phantom's surface in mm (0 for wells imaged from above); "
                             "recorded, and checked when the calibration is applied")
    parser.add_argument("--tissue", default="phantom", help="the phantom's medium, recorded (e.g. '1 %% Intralipid')")
    parser.add_argument("--method", choices=("nnls", "ls", "wls"), default="nnls", help="unmixing method (default nnls)")
    parser.add_argument("--dark", help="dark-frame stack subtracted from every file")
    parser.add_argument("--gain", type=float, default=1.0, help="camera gain, e-/count (default 1)")
    parser.add_argument("--read-noise", type=float, default=0.0, help="camera read noise, e- rms (default 0)")
    parser.add_argument("--json", action="store_true", help="print the calibration as JSON")
    add_output_options(parser)


def run(args: argparse.Namespace) -> int:
    from pathlib import Path

    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.cli.common import model_notes, print_json, print_table
    from probeplan.errors import input_error, positive_number
    from probeplan.io.atomic import check_outputs, make_output_folder, refuse_input_paths, write_bytes_atomic, write_text_atomic
    from probeplan.report.document import figure_png_bytes
    from probeplan.study.calibration import calibrate_phantom, plot_calibration
    from probeplan.unmixing.references import read_references_csv

    positive_number("--depth-mm", args.depth_mm, allow_zero=True)
    positive_number("--gain", args.gain)
    positive_number("--read-noise", args.read_noise, allow_zero=True)
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise input_error("--out", f"{str(out)!r} is a file", "give a folder for the calibration outputs")
    refs = read_references_csv(args.references)
    with model_notes() as messages:
        cal = calibrate_phantom(args.phantom, refs, depth_mm=args.depth_mm, tissue=args.tissue, method=args.method,
                                dark=args.dark, gain_e_per_count=args.gain, read_noise_e=args.read_noise)
    targets = [out / "calibration.csv", out / "calibration_points.csv", out / "calibration.png"]
    refuse_input_paths(targets, [args.phantom, args.references, *cal.points["file"]], option="--out")
    if out.is_dir():
        check_outputs(targets)
    make_output_folder(out)
    write_text_atomic(targets[0], cal.table.to_csv(index=False))
    write_text_atomic(targets[1], cal.points.drop(columns=["line"]).to_csv(index=False))
    write_bytes_atomic(targets[2], figure_png_bytes(plot_calibration(cal)))
    notes = [*cal.notes, *messages]
    rows = cal.table.to_dict("records")
    if args.json:
        print_json({"caution": RESEARCH_USE_CAUTION, "calibration": rows, "notes": notes,
                    "lod_rule": "3 x SD of the blank / slope (IUPAC)", "outputs": [str(p) for p in targets]})
        return 0
    print(RESEARCH_USE_CAUTION)
    print_table(rows, ["component", "slope_counts_per_uM", "intercept_counts", "lod_uM", "loq_uM", "r2",
                       "range_low_uM", "range_high_uM", "n_points"])
    print(f"phantom depth {args.depth_mm:g} mm in {args.tissue}; LOD = 3 x SD of the blank / slope (IUPAC), "
          "LOQ = 10 x SD / slope (ICH Q2)")
    for n in notes:
        print(f"note: {n}")
    for p in targets:
        print(f"wrote {p}")
    return 0
