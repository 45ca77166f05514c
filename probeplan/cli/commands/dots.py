"""``probeplan dots``: dot sizing, extinction, concentration and dose calculator."""

from __future__ import annotations

import argparse
import sys
from typing import Any

HELP = "dot sizing, extinction, concentration from absorbance, injection dose and volume"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    sub = parser.add_subparsers(dest="action", metavar="ACTION", required=True)

    p = sub.add_parser("size", help="diameter, first-exciton peak, emission peak and extinction of a sized material")
    p.add_argument("material", help="CdSe, CdTe, CdS, PbS or PbSe (see 'probeplan dots list')")
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--peak", type=float, metavar="NM", help="first-exciton absorption peak, nm")
    g.add_argument("--diameter", type=float, metavar="NM", help="dot diameter, nm")
    g.add_argument("--emission", type=float, metavar="NM", help="emission peak, nm (converted by the Stokes shift)")
    p.add_argument("--json", action="store_true", help="print JSON")

    p = sub.add_parser("conc", help="concentration (uM) from the absorbance at the first-exciton peak (Beer-Lambert)")
    p.add_argument("material", help="CdSe, CdTe, CdS, PbS or PbSe")
    p.add_argument("--peak", type=float, required=True, metavar="NM", help="first-exciton absorption peak, nm")
    p.add_argument("--absorbance", type=float, required=True, help="absorbance (decadic) at that peak")
    p.add_argument("--path-cm", type=float, default=1.0, help="cuvette path length, cm (default 1)")
    p.add_argument("--json", action="store_true", help="print JSON")

    p = sub.add_parser("dose", help="injection volume for a dose, or the dose of a volume")
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--dose-nmol-per-kg", type=float, help="dose, nmol of dots per kg body mass")
    g.add_argument("--volume-ul", type=float, help="injected volume, uL (gives the dose)")
    p.add_argument("--mass-g", type=float, required=True, help="body mass, g")
    p.add_argument("--stock-uM", type=float, required=True, help="stock concentration of dots, uM")
    p.add_argument("--material", help="core compound (CdSe, CdTe, CdS, PbS, PbSe): adds mg of metal per kg")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--diameter", type=float, metavar="NM", help="core diameter, nm (with --material)")
    g.add_argument("--emission", type=float, metavar="NM", help="emission peak, nm: core diameter from the sizing curve")
    p.add_argument("--shell", help="shell compound, e.g. ZnS or CdS (with --shell-nm)")
    p.add_argument("--shell-nm", type=float, default=0.0, metavar="NM", help="shell thickness, nm")
    p.add_argument("--json", action="store_true", help="print JSON")

    p = sub.add_parser("list", help="list the materials with their emission ranges and sources")
    p.add_argument("--json", action="store_true", help="print JSON")


def _size(args: argparse.Namespace) -> dict[str, Any]:
    from probeplan.model import dots

    name = dots.material_properties(args.material)["name"]
    if args.diameter is not None:
        d = float(args.diameter)
        peak = dots.exciton_peak_nm(name, d)
    else:
        peak = args.peak if args.peak is not None else dots.exciton_peak_from_emission_nm(name, args.emission)
        d = dots.diameter_nm(name, peak)
    return {
        "material": name,
        "diameter_nm": d,
        "exciton_peak_nm": float(peak),
        "emission_peak_nm": float(dots.emission_peak_from_exciton_nm(name, peak)),
        "extinction_per_M_cm": dots.extinction_coefficient(name, d),
        "absorption_model": dots.absorption_model(name),
        "source": next(m["source"] for m in dots.list_materials() if m["name"] == name),
        "note": "emission peak from a typical Stokes shift (assumption)",
    }


def _conc(args: argparse.Namespace) -> dict[str, Any]:
    from probeplan.model import dots

    name = dots.material_properties(args.material)["name"]
    d = dots.diameter_nm(name, args.peak)
    return {
        "material": name,
        "exciton_peak_nm": args.peak,
        "absorbance": args.absorbance,
        "path_cm": args.path_cm,
        "diameter_nm": d,
        "extinction_per_M_cm": dots.extinction_coefficient(name, d),
        "concentration_uM": dots.concentration_uM(name, args.peak, args.absorbance, args.path_cm),
    }


def _dose(args: argparse.Namespace) -> dict[str, Any]:
    from probeplan.errors import input_error
    from probeplan.model import dots

    if args.volume_ul is not None:
        volume = float(args.volume_ul)
        dose = dots.dose_nmol_per_kg(volume, args.mass_g, args.stock_uM)
    else:
        dose = float(args.dose_nmol_per_kg)
        volume = dots.dose_volume_ul(dose, args.mass_g, args.stock_uM)
    out = {
        "dose_nmol_per_kg": dose,
        "body_mass_g": args.mass_g,
        "stock_uM": args.stock_uM,
        "amount_nmol": dose * args.mass_g / dots.G_PER_KG,
        "volume_ul": volume,
        "volume_ml_per_kg": volume / args.mass_g,
        "caution": "compare the volume with your institution's injection-volume limit for the species and route "
                   "(see 'probeplan check'); the animal care committee decides",
    }
    if args.material is None:
        if args.diameter is not None or args.emission is not None or args.shell is not None:
            raise input_error("--material", "missing", "give the core compound with --diameter/--emission/--shell")
        return out
    from probeplan.model import metal_dose

    name = dots.material_properties(args.material)["name"]
    if args.diameter is not None:
        diameter = float(args.diameter)
    elif args.emission is not None:
        diameter = float(dots.diameter_nm(name, dots.exciton_peak_from_emission_nm(name, args.emission)))
    else:
        raise input_error("--material", "given without a size", "add --diameter NM or --emission NM")
    mg = metal_dose.heavy_metal_dose_mg_per_kg(name, diameter, dose, shell=args.shell,
                                               shell_thickness_nm=args.shell_nm)
    out.update({
        "material": name,
        "core_diameter_nm": diameter,
        "shell": args.shell or "",
        "shell_thickness_nm": args.shell_nm,
        **{f"{el}_mg_per_kg": v for el, v in mg.items()},
        "metal_mg_per_kg": float(sum(mg.values())),
        "metal_source": "bulk lattice density x dot volume x metal mass fraction (CRC Handbook densities, IUPAC "
                        "atomic weights; an estimate)",
    })
    return out


def run(args: argparse.Namespace) -> int:
    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.cli.common import format_value, print_json, print_table
    from probeplan.notes import collect_notes

    with collect_notes() as messages:
        if args.action == "list":
            from probeplan.model import dots

            rows = dots.list_materials()
            if args.json:
                print_json(rows)
            else:
                table = [dict(r, emission_range_nm="{:.0f}-{:.0f}".format(*r["emission_range_nm"]),
                              heavy_metal=r["heavy_metal"] or "-") for r in rows]
                print_table(table, ["name", "kind", "emission_range_nm", "fwhm_nm", "quantum_yield", "heavy_metal",
                                    "source"])
                print(f"\n{RESEARCH_USE_CAUTION}")
            return 0
        result = {"size": _size, "conc": _conc, "dose": _dose}[args.action](args)
    for message in messages:
        sys.stderr.write(f"probeplan dots: warning: {message}\n")
    material = result.get("material")
    if material:
        from probeplan.model import dots

        result["caution"] = dots.material_properties(material)["caution"]
    if args.json:
        print_json(dict(result, warnings=messages, research_use=RESEARCH_USE_CAUTION))
        return 0
    width = max(len(k) for k in result)
    for key, value in result.items():
        print(f"{key:<{width}}  {format_value(value)}")
    print(f"\n{RESEARCH_USE_CAUTION}")
    return 0
