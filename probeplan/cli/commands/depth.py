"""``probeplan depth``: SBR, SNR and blur against depth for probes in a tissue."""

from __future__ import annotations

import argparse

HELP = "SBR, SNR and blur against target depth for each probe in a tissue"

#: Most depths one run evaluates (--depth-max-mm / --depth-step-mm).
_MAX_DEPTHS = 10_000


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from probeplan.cli.common import add_output_options
    from probeplan.cli.model_options import add_model_options

    add_model_options(parser)
    g = parser.add_argument_group("depths and output")
    g.add_argument("--depth-max-mm", type=float, default=10.0, help="deepest target depth in mm (default 10)")
    g.add_argument("--depth-step-mm", type=float, default=0.5, help="depth step in mm (default 0.5)")
    g.add_argument("--sbr-threshold", type=float, default=2.0,
                   help="SBR below which a target counts as lost (default 2: common practice, not a standard)")
    g.add_argument("--json", action="store_true", help="print every row and the summary as JSON")
    g.add_argument("--csv", metavar="FILE", help="write every row to a CSV file")
    g.add_argument("--plot", metavar="PNG", help="write SBR/SNR/blur against depth to a PNG file")
    g.add_argument("--transport-model", default="auto", choices=["auto", "mc_table", "diffusion"],
                   help="light transport: auto (default: the most accurate shipped, Monte Carlo tables), "
                        "mc_table, or diffusion theory")
    add_output_options(parser)


def run(args: argparse.Namespace) -> int:
    import math

    import numpy as np

    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.cli.common import model_notes, print_json, print_table
    from probeplan.cli.model_options import setup_from_args
    from probeplan.errors import input_error
    from probeplan.io.atomic import check_outputs, refuse_input_paths, write_bytes_atomic, write_csv_atomic
    from probeplan.model.fluorescence import depth_at_threshold, depth_profile
    from probeplan.study import safety

    filters = args.filter or []
    if not filters:
        raise input_error("--filter", "no emission filter given", "give --filter, e.g. 700/30")
    if len(filters) not in (1, len(args.probe)):
        raise input_error("--filter", f"{len(filters)} filters for {len(args.probe)} probes",
                          "give one --filter per --probe (or one for all)")
    if not (0 < args.depth_step_mm <= args.depth_max_mm < math.inf):  # also refuses NaN
        raise input_error("--depth-max-mm/--depth-step-mm", f"got {args.depth_max_mm:g}/{args.depth_step_mm:g}",
                          "give a positive maximum depth and a smaller positive step")
    outputs = [p for p in (args.csv, args.plot) if p]
    refuse_input_paths(outputs, [s.partition("@")[2] for s in args.probe if "@" in s], option="--csv/--plot")
    check_outputs(outputs)
    n_depths = int(args.depth_max_mm / args.depth_step_mm) + 1
    if n_depths > _MAX_DEPTHS:
        raise input_error("--depth-max-mm/--depth-step-mm", f"{n_depths} depths asked for",
                          f"give at most {_MAX_DEPTHS} (a larger --depth-step-mm)")
    setup = setup_from_args(args)
    depths = np.arange(0.0, args.depth_max_mm + args.depth_step_mm / 2, args.depth_step_mm)
    profiles = []
    with model_notes() as messages:
        for i, probe in enumerate(setup.probes):
            ch = setup.channels[i if len(setup.channels) > 1 else 0]
            profiles.append(depth_profile(
                setup.tissue, probe, source=setup.source, irradiance_mw_per_cm2=setup.irradiance_mw_per_cm2,
                emission_filter=ch.emission_filter, camera=setup.camera, lens=setup.lens, exposure_s=ch.exposure_s,
                depth_mm=depths, target_size_mm=args.size_mm, concentration_uM=args.concentration_uM,
                uptake_ratio=args.uptake_ratio, autofluorescence=setup.autofluorescence,
                transport_model=args.transport_model,
            ))
        skin_check = safety.setup_skin_exposure(setup)
    mpe = skin_check.mpe_mw_per_cm2
    summary = []
    for p in profiles:
        lost = depth_at_threshold(p, args.sbr_threshold)
        summary.append({"probe": p.probe, "depth_at_sbr_threshold_mm": lost,
                        "sbr_at_surface": float(p.sbr[0]), "snr_at_surface": float(p.snr[0]),
                        "background_e": p.background_e, "saturates": bool(p.saturated.any())})
    rows = [r for p in profiles for r in p.rows()]
    if args.csv:
        write_csv_atomic(args.csv, rows)
    if args.plot:
        from probeplan.report.document import figure_png_bytes
        from probeplan.report.figures import depth_and_spectra_figure

        write_bytes_atomic(args.plot, figure_png_bytes(depth_and_spectra_figure(profiles, args.sbr_threshold)))
    notes = sorted({n for p in profiles for n in p.notes}) + messages
    skin = {"wavelength_nm": args.excitation_nm, "irradiance_mw_per_cm2": args.irradiance,
            "on_time_per_session_s": skin_check.total_on_time_s, "skin_mpe_mw_per_cm2": mpe,
            "fraction_of_mpe": skin_check.ratio, "governing_rule": skin_check.governing_rule,
            "allowed_fraction": skin_check.allowed_fraction}
    from probeplan.model.transport import TRANSPORT_MODELS

    transport_model = profiles[0].transport_model if profiles else args.transport_model
    if args.json:
        print_json({"caution": RESEARCH_USE_CAUTION, "transport_model": transport_model,
                    "sbr_threshold": args.sbr_threshold,
                    "sbr_threshold_note": "common practice, not a standard", "skin": skin,
                    "summary": summary, "rows": rows, "notes": notes})
        return 0
    print(RESEARCH_USE_CAUTION)
    flag = "  ABOVE THE SKIN LIMIT" if skin_check.ratio > 1.0 else ""
    print(f"excitation {args.excitation_nm:g} nm at {args.irradiance:g} mW/cm^2; skin MPE for one session's "
          f"{skin_check.total_on_time_s:g} s of light on one site {mpe:.0f} mW/cm^2 "
          f"({100 * skin_check.ratio:.1f} % of it, {skin_check.governing_rule} rule){flag}")
    print(f"light transport: {transport_model}: {TRANSPORT_MODELS.get(transport_model, '')}\n")
    step = max(1, int(round(1.0 / args.depth_step_mm)))
    shown = [r for p in profiles for r in p.rows()[::step]]
    print_table(shown, ["probe", "depth_mm", "signal_e", "background_e", "sbr", "snr", "blur_fwhm_mm",
                        "escaped_peak_nm", "spectral_shift_nm", "diffusion_valid"])
    print()
    print_table(summary, ["probe", "depth_at_sbr_threshold_mm", "sbr_at_surface", "snr_at_surface", "saturates"])
    print(f"\nSBR threshold {args.sbr_threshold:g} (common practice, not a standard)")
    for n in notes:
        print(f"note: {n}")
    for path in outputs:
        print(f"wrote {path}")
    return 0
