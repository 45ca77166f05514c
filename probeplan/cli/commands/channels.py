"""``probeplan channels``: channel responses, crosstalk and separability of a probe/filter set."""

from __future__ import annotations

import argparse

HELP = "channel responses, crosstalk, condition number and noise amplification of a probe/filter set"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from probeplan.cli.common import add_output_options
    from probeplan.cli.model_options import add_model_options

    add_model_options(parser)
    g = parser.add_argument_group("depths and output")
    g.add_argument("--depth-mm", type=float, action="append",
                   help="target depth in mm; repeat for several depths (default 1, 3 and 5)")
    g.add_argument("--fail-if-not-separable", action="store_true",
                   help="exit 1 when the set cannot be separated at some depth")
    g.add_argument("--json", action="store_true", help="print the report as JSON")
    g.add_argument("--plot", metavar="PNG", help="write emission spectra with filter bands and the crosstalk map")
    add_output_options(parser)


def run(args: argparse.Namespace) -> int:
    import numpy as np

    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.cli.common import model_notes, print_json, print_table
    from probeplan.cli.model_options import setup_from_args
    from probeplan.io.atomic import check_outputs, refuse_input_paths
    from probeplan.model.channels import SEPARABLE_CONDITION_LIMIT, channel_report

    if args.plot:
        refuse_input_paths([args.plot], [s.partition("@")[2] for s in args.probe if "@" in s], option="--plot")
        check_outputs([args.plot])
    setup = setup_from_args(args)
    probes, channels = setup.probes, setup.channels
    depths = args.depth_mm or [1.0, 3.0, 5.0]
    with model_notes() as notes:
        rep = channel_report(setup.tissue, probes, channels, irradiance_mw_per_cm2=setup.irradiance_mw_per_cm2,
                             depth_mm=depths, target_size_mm=args.size_mm, concentration_uM=args.concentration_uM,
                             uptake_ratio=args.uptake_ratio, autofluorescence=setup.autofluorescence)
    rep.notes += [n for n in notes if n not in rep.notes]
    if args.plot:
        _write_plot(args.plot, probes, channels, rep)
    problem = bool(args.fail_if_not_separable and not rep.separable.all())
    if args.json:
        print_json({"caution": RESEARCH_USE_CAUTION, **rep.as_dict(),
                    "separable_condition_limit": SEPARABLE_CONDITION_LIMIT})
        return 1 if problem else 0
    print(RESEARCH_USE_CAUTION)
    for d_i, depth in enumerate(rep.depth_mm):
        print(f"\ntarget depth {depth:g} mm: condition number {rep.condition_number[d_i]:.3g} "
              f"({'separable' if rep.separable[d_i] else 'NOT separable'})")
        rows = []
        for c, ch in enumerate(rep.channel_names):
            row = {"channel": ch}
            for k, name in enumerate(rep.probe_names):
                row[f"{name} crosstalk"] = float(rep.crosstalk[d_i, c, k])
            row["leakage_e_per_s"] = float(rep.leakage_e_per_s[c])
            rows.append(row)
        print_table(rows)
        per_probe = [{"probe": n, "response_in_own_channel_e_per_s_per_uM": float(np.max(rep.response_e_per_s_per_uM[d_i, :, k])),
                      "noise_amplification": float(rep.noise_amplification[d_i, k]),
                      "unmixed_snr": float(rep.unmixed_snr[d_i, k])} for k, n in enumerate(rep.probe_names)]
        print_table(per_probe)
    for n in rep.notes:
        print(f"note: {n}")
    if args.plot:
        print(f"wrote {args.plot}")
    return 1 if problem else 0


def _write_plot(path: str, probes, channels, rep) -> None:
    from probeplan.io.atomic import write_bytes_atomic
    from probeplan.model.fluorescence import emission_grid_nm
    from probeplan.report.document import figure_png_bytes
    from probeplan.report.figures import channels_figure

    fig = channels_figure(emission_grid_nm(probes), probes, channels, rep.crosstalk[0], rep.probe_names,
                          rep.channel_names, depth_mm=float(rep.depth_mm[0]))
    write_bytes_atomic(path, figure_png_bytes(fig))
