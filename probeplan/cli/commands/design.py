"""``probeplan design``: exhaustive search for the probe / filter / source combination with the best worst-probe SNR.

Candidate probes are ``MATERIAL:PEAK[:QY]`` (as ``--probe`` elsewhere) or a
series ``MATERIAL:START-STOP:STEP[:QY]`` (e.g. ``CdTeSe:660-840:20``).
Candidate filters are trade notation (``--candidate-filter 700/30``) or a grid
of bandpass filters ``--filter-grid START:STOP:STEP:WIDTH[,WIDTH...]`` (nm).
"""

from __future__ import annotations

import argparse

HELP = "search every probe / filter / source combination for the best worst-probe unmixed SNR at depth"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from probeplan.cli.model_options import add_optics_options, add_target_options

    g = parser.add_argument_group("tissue and candidates")
    g.add_argument("--tissue", default="soft tissue", help="tissue preset or user tissue (default: 'soft tissue')")
    g.add_argument("--candidate-probe", action="append", required=True, metavar="MATERIAL:PEAK|MATERIAL:START-STOP:STEP",
                   help="a candidate probe (CdTe:700, CdTe:700:0.4 with QY) or a series (CdTeSe:660-840:20); repeat")
    g.add_argument("--candidate-filter", action="append", metavar="FILTER",
                   help="a candidate emission filter, e.g. 700/30 or 'LP 1000' or a user-library name; repeat")
    g.add_argument("--filter-grid", action="append", metavar="START:STOP:STEP:WIDTHS",
                   help="bandpass filters at centres START..STOP every STEP nm, each WIDTH (comma list), "
                        "e.g. 650:1000:10:20,30,40; repeat")
    g = parser.add_argument_group("excitation")
    g.add_argument("--excitation-nm", action="append", type=float, metavar="NM",
                   help="a candidate laser wavelength in nm; repeat to compare sources (default 640)")
    g.add_argument("--linewidth-nm", type=float, default=1.0, help="laser linewidth FWHM in nm (default 1)")
    g.add_argument("--led-fwhm-nm", type=float, help="use LEDs of this FWHM (nm) centred on each --excitation-nm")
    g.add_argument("--irradiance", type=float, default=None, metavar="MW_PER_CM2",
                   help="irradiance on the skin in mW/cm^2 for every source (default: each source's skin MPE; "
                        "a value above the MPE is refused)")
    g.add_argument("--illumination-s", type=float, default=None,
                   help="seconds of light on the skin per session, for the MPE (default: at least 10 s)")
    g = parser.add_argument_group("detection")
    g.add_argument("--camera", action="append", metavar="NAME",
                   help="camera (default si-deep-depletion); give two (e.g. si-deep-depletion and ingaas) to let "
                        "each filter use the camera with the larger band-integrated QE")
    add_optics_options(g)
    g = parser.add_argument_group("target")
    g.add_argument("--depth-mm", type=float, required=True, help="target depth below the surface in mm")
    add_target_options(g)
    g = parser.add_argument_group("search and output")
    g.add_argument("--k", type=int, required=True, help="number of probes to multiplex")
    g.add_argument("--channels", type=int, default=None,
                   help="filters per combination (default: k; k + 1 adds a spare channel)")
    g.add_argument("--top", type=int, default=5, help="number of best combinations shown (default 5)")
    g.add_argument("--json", action="store_true", help="print the result as JSON (no progress bar)")
    g.add_argument("--no-progress", action="store_true", help="no progress bar")


def _candidate_probes(specs: list[str]) -> list:
    from probeplan.catalog.resolve import probe as parse_probe
    from probeplan.design.search import probe_series
    from probeplan.errors import input_error

    probes = []
    for spec in specs:
        parts = spec.split(":")
        if len(parts) >= 2 and "-" in parts[1].strip()[1:] and "@" not in spec:
            if len(parts) not in (3, 4):
                raise input_error("--candidate-probe", f"cannot read {spec!r}",
                                  "write a series as MATERIAL:START-STOP:STEP such as CdTeSe:660-840:20 "
                                  "(QY optional: CdTeSe:660-840:20:0.3)")
            lo, _, hi = parts[1].strip().partition("-")
            try:
                start, stop, step = float(lo), float(hi), float(parts[2])
                qy = float(parts[3]) if len(parts) == 4 else None
            except ValueError:
                raise input_error("--candidate-probe", f"{spec!r}: START, STOP, STEP and QY must be numbers",
                                  "write e.g. CdTeSe:660-840:20") from None
            probes += probe_series(parts[0], start, stop, step, **({} if qy is None else {"quantum_yield": qy}))
        else:
            probes.append(parse_probe(spec))
    return probes


def _candidate_filters(args: argparse.Namespace) -> list:

    from probeplan.catalog.resolve import emission_filter as make_filter
    from probeplan.design.search import filter_grid
    from probeplan.errors import input_error
    from probeplan.model.spectra import grid_nm

    filters = [make_filter(f) for f in (args.candidate_filter or [])]
    for grid in args.filter_grid or []:
        parts = grid.split(":")
        try:
            if len(parts) != 4:
                raise ValueError
            start, stop, step = float(parts[0]), float(parts[1]), float(parts[2])
            widths = [float(w) for w in parts[3].split(",") if w.strip()]
        except ValueError:
            raise input_error("--filter-grid", f"cannot read {grid!r}",
                              "write START:STOP:STEP:WIDTHS in nm, e.g. 650:1000:10:20,30,40") from None
        if not (step > 0 and stop >= start and widths):
            raise input_error("--filter-grid", f"{grid!r}", "give STOP >= START, STEP > 0 and at least one width")
        centres = grid_nm(start, stop, step)
        filters += filter_grid(centres, widths)
    if not filters:
        raise input_error("--candidate-filter/--filter-grid", "no candidate filter given",
                          "give --candidate-filter 700/30 (repeat) or --filter-grid 650:1000:10:20,30,40")
    return filters


def run(args: argparse.Namespace) -> int:
    import sys

    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.catalog import resolve
    from probeplan.cli.common import print_json, print_table
    from probeplan.design.search import design
    from probeplan.model.fluorescence import Autofluorescence
    from probeplan.notes import collect_notes

    probes = _candidate_probes(args.candidate_probe)
    filters = _candidate_filters(args)
    sources = [resolve.source(nm, linewidth_nm=args.linewidth_nm, led_fwhm_nm=args.led_fwhm_nm)
               for nm in (args.excitation_nm or [640.0])]
    cameras = [resolve.camera(name, args.binning) for name in (args.camera or ["si-deep-depletion"])]
    lens = resolve.lens(args.f_number, args.magnification)
    tissue = resolve.tissue(args.tissue)
    af = None if args.af_yield is None else Autofluorescence(yield_per_cm=args.af_yield)

    bar = None
    if not args.json and not args.no_progress and sys.stderr.isatty():
        from tqdm import tqdm

        bar = tqdm(total=0, unit=" filter sets", file=sys.stderr, leave=False, desc="design search")

    def progress(done: int, total: int) -> None:
        if bar is not None:
            bar.total = total
            bar.n = done
            bar.refresh()

    with collect_notes() as collected:
        try:
            result = design(
                tissue, probes, filters, sources=sources, camera=cameras, lens=lens, k=args.k,
                n_channels=args.channels, depth_mm=args.depth_mm, exposure_s=args.exposure_s,
                irradiance_mw_per_cm2=args.irradiance, illumination_s=args.illumination_s,
                target_size_mm=args.size_mm, concentration_uM=args.concentration_uM, uptake_ratio=args.uptake_ratio,
                autofluorescence=af, top=args.top, progress=progress,
            )
        finally:
            if bar is not None:
                bar.close()
    notes = list(dict.fromkeys(result.notes + collected))
    by_name = {p.name: p for p in probes}
    cautions = sorted({by_name[n].caution for c in result.candidates[:1] for n in c.probes
                       if n in by_name and by_name[n].heavy_metal})
    if args.json:
        out = {"caution": RESEARCH_USE_CAUTION, **result.as_dict(), "notes": notes, "material_cautions": cautions}
        print_json(out)
        return 0
    print(RESEARCH_USE_CAUTION)
    for s in result.sources:
        print(f"source {s['name']}: {s['irradiance_mw_per_cm2']:.4g} mW/cm^2 on the skin "
              f"(skin MPE {s['skin_mpe_mw_per_cm2']:.4g} mW/cm^2 for {s['illumination_s']:g} s of light)")
    print(f"target at {result.depth_mm:g} mm, {args.concentration_uM:g} µM, exposure {result.exposure_s:g} s per channel; "
          f"{len(probes)} candidate probes, {len(filters)} candidate filters, k = {result.k}, "
          f"{result.n_channels} channels\n")
    rows = [{"rank": c.rank, "worst_snr": c.worst_snr, "limiting_probe": c.limiting_probe, "source": c.source,
             "probes": ", ".join(c.probes), "filters": ", ".join(c.filters), "condition": c.condition_number,
             "max_noise_amp": max(c.noise_amplification), "separable": c.separable} for c in result.candidates]
    print_table(rows, ["rank", "worst_snr", "limiting_probe", "source", "probes", "filters", "condition",
                       "max_noise_amp", "separable"])
    best = result.best
    if best is not None:
        print()
        print_table([{"probe": p, "unmixed_snr": s, "noise_amplification": a}
                     for p, s, a in zip(best.probes, best.snr, best.noise_amplification, strict=True)],
                    ["probe", "unmixed_snr", "noise_amplification"])
        print("channels: " + ", ".join(f"{f} on {c}" for f, c in zip(best.filters, best.cameras, strict=True)))
    print()
    print(result.explanation())
    rate = result.total_combinations / result.search_s if result.search_s > 0 else float("inf")
    print(f"\nprecomputation {result.precompute_s:.2f} s; search {result.search_s:.2f} s "
          f"({rate:.3g} combinations/s covered, {result.pruned:,} pruned)")
    for c in cautions:
        print(f"caution: {c}")
    for n in notes:
        print(f"note: {n}")
    return 0
