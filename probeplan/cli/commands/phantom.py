"""``probeplan phantom``: a liquid phantom recipe for a target mu_a and mu_s' (or a plan's tissue), with its SBR curve."""

from __future__ import annotations

import argparse

HELP = "a phantom recipe (scatterer + absorber in water) for a target mu_a, mu_s' or a plan's tissue, with a preparation sheet"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from probeplan.cli.common import add_output_options

    target = parser.add_argument_group("target (a plan, or explicit values)")
    target.add_argument("--plan", help="study plan TOML: match its tissue at the excitation and each probe's emission, "
                                       "and predict the phantom's SBR against depth")
    target.add_argument("--wavelength-nm", type=float, nargs="+", help="wavelengths to match (nm)")
    target.add_argument("--mu-a", type=float, nargs="+", help="target mu_a per wavelength (cm^-1)")
    target.add_argument("--mu-s-prime", type=float, nargs="+", help="target mu_s' per wavelength (cm^-1)")
    parser.add_argument("--scatterer", default="intralipid-20",
                        choices=("intralipid-10", "intralipid-20", "polystyrene", "silica", "tio2"),
                        help="scatterer (default intralipid-20): emulsion by van Staveren 1991, spheres by Mie theory")
    parser.add_argument("--diameter-um", type=float, default=None,
                        help="sphere diameter in um (spheres only; default 1 um, 0.3 um for tio2)")
    parser.add_argument("--absorber", default="india-ink",
                        help="'india-ink' (a stated typical assumption) or a CSV of the stock's measured absorption "
                             "(wavelength_nm, one column in cm^-1)")
    parser.add_argument("--batch-ml", type=float, default=100.0, help="batch volume in mL (default 100)")
    parser.add_argument("--out", help="folder for recipe.csv, preparation.csv and (with --plan) sbr_curve.csv, sbr_curve.png")
    parser.add_argument("--json", action="store_true", help="print the recipe as JSON")
    add_output_options(parser)


def _absorber(spec: str):
    from pathlib import Path

    from probeplan.errors import input_error
    from probeplan.model.spectra import read_spectra_csv

    if spec.lower() == "india-ink":
        return "india-ink"
    if not Path(spec).is_file():
        raise input_error("--absorber", f"{spec!r} is neither india-ink nor a file",
                          "give india-ink or the CSV of your stock's absorption (wavelength_nm, mu_a in cm^-1)")
    spectra = read_spectra_csv(spec, kind="material", unit="cm^-1")
    if len(spectra) != 1:
        raise input_error(spec, f"{len(spectra)} absorption columns", "give exactly one column after wavelength_nm")
    return next(iter(spectra.values()))


def run(args: argparse.Namespace) -> int:
    from pathlib import Path

    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.cli.common import model_notes, print_json, print_table
    from probeplan.errors import input_error, positive_number
    from probeplan.io.atomic import check_outputs, make_output_folder, refuse_input_paths, write_bytes_atomic, write_csv_atomic
    from probeplan.study.phantom import PHANTOM_CAUTION

    positive_number("--batch-ml", args.batch_ml)
    if args.diameter_um is not None:
        positive_number("--diameter-um", args.diameter_um)
    for option, values in (("--wavelength-nm", args.wavelength_nm), ("--mu-a", args.mu_a),
                           ("--mu-s-prime", args.mu_s_prime)):
        for v in values or ():
            positive_number(option, v)
    absorber = _absorber(args.absorber)
    explicit = [args.wavelength_nm, args.mu_a, args.mu_s_prime]
    curve = []
    with model_notes() as messages:
        if args.plan:
            if any(v is not None for v in explicit):
                raise input_error("--plan", "given with explicit targets", "give either --plan or the three target options")
            from probeplan.study.phantom import plan_phantom
            from probeplan.study.plan import load_plan

            result = plan_phantom(load_plan(args.plan), scatterer=args.scatterer, absorber=absorber,
                                  diameter_um=args.diameter_um, batch_ml=args.batch_ml)
            recipe, curve, notes = result.recipe, result.sbr_curve, result.notes
        else:
            if any(v is None for v in explicit):
                raise input_error("--wavelength-nm/--mu-a/--mu-s-prime", "not all given",
                                  "give the three (one value per wavelength), or --plan PLAN.toml")
            from probeplan.model.phantom import phantom_recipe

            recipe = phantom_recipe(args.wavelength_nm, args.mu_a, args.mu_s_prime, scatterer=args.scatterer,
                                    absorber=absorber, diameter_um=args.diameter_um, batch_ml=args.batch_ml)
            notes = [*recipe.notes, PHANTOM_CAUTION]
    notes = list(dict.fromkeys([*notes, *messages]))
    sheet = recipe.preparation()
    written = []
    if args.out:
        out = Path(args.out)
        if out.exists() and not out.is_dir():
            raise input_error("--out", f"{str(out)!r} is a file", "give a folder")
        inputs = [p for p in (args.plan, args.absorber) if p and Path(p).is_file()]
        targets = [out / "recipe.csv", out / "preparation.csv"] + ([out / "sbr_curve.csv", out / "sbr_curve.png"] if curve else [])
        refuse_input_paths(targets, inputs, option="--out")
        if out.is_dir():
            check_outputs(targets)
        make_output_folder(out)
        written.append(write_csv_atomic(targets[0], recipe.table))
        written.append(write_csv_atomic(targets[1], sheet))
        if curve:
            written.append(write_csv_atomic(targets[2], curve))
            written.append(write_bytes_atomic(targets[3], _curve_png(curve)))
    summary = {"scatterer": recipe.scatterer, "diameter_um": recipe.diameter_um, "scatterer_fraction": recipe.scatterer_fraction,
               "absorber": recipe.absorber, "absorber_fraction": recipe.absorber_fraction, "batch_ml": recipe.batch_ml}
    if args.json:
        print_json({"caution": RESEARCH_USE_CAUTION, "recipe": summary, "properties": recipe.table,
                    "preparation": sheet, "sbr_curve": curve, "notes": notes, "outputs": [str(p) for p in written]})
        return 0
    print(RESEARCH_USE_CAUTION)
    print(f"{recipe.scatterer}: {100 * recipe.scatterer_fraction:.3g} % by volume; {recipe.absorber}: "
          f"{100 * recipe.absorber_fraction:.3g} % by volume\n")
    print_table(recipe.table)
    print()
    print_table(sheet, ["step", "ingredient", "volume_ml", "mass_g", "how"])
    if curve:
        print()
        print_table([r for r in curve if float(r["depth_mm"]).is_integer()],
                    ["probe", "channel", "depth_mm", "sbr_phantom", "sbr_tissue"])
    for n in notes:
        print(f"note: {n}")
    for p in written:
        print(f"wrote {p}")
    return 0


def _curve_png(curve) -> bytes:
    from matplotlib.figure import Figure

    from probeplan.report.document import figure_png_bytes

    fig = Figure(figsize=(5.5, 3.6), layout="constrained")
    ax = fig.subplots()
    for probe in dict.fromkeys(r["probe"] for r in curve):
        rows = [r for r in curve if r["probe"] == probe]
        line, = ax.plot([r["depth_mm"] for r in rows], [r["sbr_phantom"] for r in rows], label=f"{probe}, phantom")
        ax.plot([r["depth_mm"] for r in rows], [r["sbr_tissue"] for r in rows], ls="--", color=line.get_color(),
                label=f"{probe}, tissue (plan)")
    ax.set_yscale("log")
    ax.set_xlabel("inclusion depth (mm)")
    ax.set_ylabel("SBR = (S + B) / B")
    ax.legend(fontsize=7)
    return figure_png_bytes(fig)
