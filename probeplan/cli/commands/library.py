"""``probeplan library``: list and show the shipped and user library with sources."""

from __future__ import annotations

import argparse

HELP = "list or show library items (tissues, chromophores, materials, cameras, filters) with their sources"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    sub = parser.add_subparsers(dest="action", metavar="ACTION", required=True)
    p_list = sub.add_parser("list", help="list every item, or those of one --kind")
    p_list.add_argument("--kind", help="only this kind (tissue, chromophore, material, camera, filter, ...)")
    p_list.add_argument("--json", action="store_true", help="print JSON")
    p_show = sub.add_parser("show", help="show one item with its source and details")
    p_show.add_argument("name", help="the item's name, e.g. 'skin' or 'HbO2'")
    p_show.add_argument("--json", action="store_true", help="print JSON")
    p_path = sub.add_parser("path", help="print the user library folder (set PROBEPLAN_LIBRARY to move it)")
    p_path.add_argument("--json", action="store_true", help="print JSON")


def run(args: argparse.Namespace) -> int:
    from probeplan.catalog import library
    from probeplan.cli.common import print_json, print_table

    if args.action == "list":
        rows = [e.as_dict() for e in library.entries(args.kind)]
        if args.json:
            print_json(rows)
        else:
            print_table(rows, ["kind", "name", "description", "source"])
            print(f"\nuser library folder: {library.user_library_dir()} (set {library.LIBRARY_ENV} to move it)")
        return 0
    if args.action == "show":
        entry = library.lookup(args.name).as_dict()
        if args.json:
            print_json(entry)
        else:
            for key in ("name", "kind", "description", "source", "origin"):
                print(f"{key:12s} {entry[key]}")
            for key, value in entry["details"].items():
                print(f"  {key}: {value}")
        return 0
    path = library.user_library_dir()
    if args.json:
        print_json({"user_library": str(path), "exists": path.is_dir()})
    else:
        print(path)
    return 0
