"""The library: every shipped and user-added item by name, with its source.

Shipped items are tissue presets and chromophores (:mod:`probeplan.model.tissue`),
dot materials (:mod:`probeplan.model.dots`), cameras and example filters
(:mod:`probeplan.model.optics`).

The user library folder
-----------------------
Users add their own items in a folder, by default
``$XDG_DATA_HOME/probeplan`` (``~/.local/share/probeplan`` when
``XDG_DATA_HOME`` is unset), or wherever the environment variable
``PROBEPLAN_LIBRARY`` points.  Its layout::

    tissues/NAME.toml      one tissue: the keys of a shipped preset (blood_fraction, saturation,
                           water_fraction, a_per_cm, b, refractive_index, ... and a `source` line)
    spectra/emission/*.csv probe emission spectra (one column per probe)
    spectra/absorption/*.csv absorption spectra in cm^-1 (e.g. `fat`, replacing the shipped fat table)
    filters/*.csv          filter transmission curves (fraction 0-1, one column per filter)
    cameras/NAME.toml      a camera (see probeplan.model.optics)

Files there are read, never written.  Every read goes through the same
validation as the command line (:func:`probeplan.model.spectra.read_spectra_csv`).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from probeplan.errors import InputError, did_you_mean, input_error

__all__ = [
    "LibraryEntry",
    "LIBRARY_ENV",
    "user_library_dir",
    "user_tissue",
    "user_tissue_names",
    "user_spectra",
    "user_filters",
    "user_camera",
    "user_camera_names",
    "entries",
    "lookup",
    "did_you_mean",
]

#: Environment variable that overrides the user library folder.
LIBRARY_ENV = "PROBEPLAN_LIBRARY"


@dataclass(frozen=True)
class LibraryEntry:
    """One named library item: its kind, a one-line description, its source and details."""

    kind: str
    name: str
    description: str
    source: str
    origin: str = "shipped"
    details: tuple[tuple[str, str], ...] = ()

    def as_dict(self) -> dict[str, Any]:
        """Plain dict for JSON and tables."""
        return {
            "kind": self.kind,
            "name": self.name,
            "description": self.description,
            "source": self.source,
            "origin": self.origin,
            "details": dict(self.details),
        }


def user_library_dir() -> Path:
    """The user library folder (it need not exist)."""
    env = os.environ.get(LIBRARY_ENV)
    if env:
        return Path(env).expanduser()
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(base) / "probeplan"


def _user_files(sub: str, pattern: str) -> list[Path]:
    folder = user_library_dir() / sub
    if not folder.is_dir():
        return []
    return sorted(p for p in folder.glob(pattern) if p.is_file())


def user_tissue_names() -> list[str]:
    """Names of tissues in the user library folder."""
    return [p.stem for p in _user_files("tissues", "*.toml")]


def _read_toml(path: Path) -> dict[str, Any]:
    from probeplan.io.tomlsource import load_toml

    return load_toml(path, what="library file")[0]


def user_tissue(name: str):
    """A tissue from the user library folder (``tissues/NAME.toml``).

    Raises
    ------
    InputError
        When there is no such file, or its content fails the tissue validation
        (the message names the file).
    """
    from probeplan.model.tissue import tissue_from_mapping

    path = user_library_dir() / "tissues" / f"{name}.toml"
    if name not in user_tissue_names():
        raise input_error("tissue", f"no user tissue {name!r} in {path.parent}", "add it there or use a preset")
    entry = _read_toml(path)
    fat = None
    if entry.get("fat_fraction", 0):
        fat = user_spectra("absorption").get("fat")
    try:
        tissue = tissue_from_mapping(name, entry)
        if fat is not None:
            tissue = tissue.with_composition(fat_absorption=fat)
        return tissue
    except (InputError, TypeError) as exc:
        raise input_error(str(path), str(exc), "correct the tissue file") from None


def user_spectra(kind: str) -> dict[str, Any]:
    """User spectra of a kind: ``"emission"``, ``"absorption"`` or ``"filter"``; name → Spectrum."""
    from probeplan.model.spectra import read_spectra_csv

    where = {"emission": ("spectra/emission", "emission"), "absorption": ("spectra/absorption", "material"),
             "filter": ("filters", "filter")}
    if kind not in where:
        raise input_error("kind", f"got {kind!r}", did_you_mean(kind, where))
    sub, spectrum_kind = where[kind]
    out: dict[str, Any] = {}
    for path in _user_files(sub, "*.csv") + _user_files(sub, "*.tsv"):
        out.update(read_spectra_csv(path, kind=spectrum_kind))
    return out


def _shipped_entries() -> list[LibraryEntry]:
    from probeplan.model import tissue

    rows: list[LibraryEntry] = []
    for name in tissue.preset_names():
        t = tissue.tissue_preset(name)
        details = (
            ("blood_fraction", f"{t.blood_fraction:g}"),
            ("saturation", f"{t.saturation:g}"),
            ("water_fraction", f"{t.water_fraction:g} (outside the blood)"),
            ("fat_fraction", f"{t.fat_fraction:g}"),
            ("melanin_fraction", f"{t.melanin_fraction:g}"),
            ("scattering", f"mu_s' = {t.a_per_cm:g} (lambda/500 nm)^-{t.b:g} cm^-1"),
            ("scattering_range_nm", "{:g}-{:g} nm measured; beyond: b_Mie = {:g}".format(
                *(t.scattering_range_nm or (float("nan"), float("nan"))), t.long_wavelength_b())),
            ("refractive_index", f"{t.refractive_index:g} (common practice)"),
            ("composition_source", t.sources.get("composition_source", "")),
        )
        rows.append(LibraryEntry("tissue", name, t.description, _expand_source(t.sources.get("scattering_source", "")),
                                 details=details))
    for name, (desc, src) in tissue.chromophore_names().items():
        rows.append(LibraryEntry("chromophore", name, desc, src))
    for provider in _PROVIDERS:
        rows.extend(provider())
    return rows


_SOURCE_KEYS = {
    "J13-T2": "Jacques, Phys. Med. Biol. 58, R37 (2013), Table 2, doi:10.1088/0031-9155/58/11/R37",
    "J13-T1": "Jacques 2013 Table 1, after Alexandrakis et al., Phys. Med. Biol. 50, 4225 (2005)",
    "S98": "Simpson et al., Phys. Med. Biol. 43, 2465 (1998), via Jacques 2013",
}


def _expand_source(key: str) -> str:
    return _SOURCE_KEYS.get(key, key)


def _dots_entries() -> list[LibraryEntry]:
    from probeplan.model import dots

    rows = []
    for m in dots.list_materials():
        lo, hi = m.get("emission_range_nm", (None, None))
        desc = f"{m.get('kind', '')} material, emission {lo}-{hi} nm" + (
            f", contains {m['heavy_metal']}" if m.get("heavy_metal") else ""
        )
        rows.append(LibraryEntry("material", str(m["name"]), desc, str(m.get("source", ""))))
    return rows


def _optics_entries() -> list[LibraryEntry]:
    from probeplan.model import optics

    rows = []
    for c in optics.list_cameras():
        rows.append(LibraryEntry("camera", str(c["name"]), str(c.get("description", "")), str(c.get("source", ""))))
    for f in optics.list_filters():
        rows.append(LibraryEntry("filter", str(f["name"]), str(f.get("description", "")), str(f.get("source", ""))))
    return rows


_PROVIDERS = [_dots_entries, _optics_entries]


def _user_entries() -> list[LibraryEntry]:
    rows = []
    folder = user_library_dir()
    for name in user_tissue_names():
        entry = _read_toml(folder / "tissues" / f"{name}.toml")
        rows.append(LibraryEntry("tissue", name, str(entry.get("description", "user tissue")),
                                 str(entry.get("source", "user file")), origin=str(folder / "tissues" / f"{name}.toml")))
    for kind in ("emission", "absorption"):
        for name, spec in user_spectra(kind).items():
            rows.append(LibraryEntry(f"{kind} spectrum", name, f"user {kind} spectrum, {spec.range_nm[0]:g}-"
                                     f"{spec.range_nm[1]:g} nm", spec.provenance, origin="user library"))
    for name, filt in user_filters().items():
        rows.append(LibraryEntry("filter", name, filt.description, str(folder / "filters"), origin="user library"))
    for name in user_camera_names():
        cam = user_camera(name)
        rows.append(LibraryEntry("camera", name, cam.description or "user camera", cam.source, origin="user library"))
    return rows


def user_filters() -> dict[str, Any]:
    """Filters from ``filters/*.csv`` in the user library (percent and OD checked as on the CLI)."""
    from probeplan.model.optics import read_filter_csv

    out: dict[str, Any] = {}
    for path in _user_files("filters", "*.csv") + _user_files("filters", "*.tsv"):
        out.update(read_filter_csv(path))
    return out


def user_camera_names() -> list[str]:
    """Names of cameras in the user library folder (``cameras/NAME.toml``)."""
    return [p.stem for p in _user_files("cameras", "*.toml")]


def user_camera(name: str):
    """A camera from ``cameras/NAME.toml`` in the user library folder."""
    from probeplan.model.optics import camera_from_dict

    path = user_library_dir() / "cameras" / f"{name}.toml"
    if name not in user_camera_names():
        raise input_error("camera", f"no user camera {name!r} in {path.parent}", "add it there or use a built-in camera")
    try:
        return camera_from_dict(name, _read_toml(path), source=str(path))
    except (InputError, TypeError, KeyError) as exc:
        raise input_error(str(path), str(exc), "correct the camera file (see probeplan/data/cameras.toml)") from None


def entries(kind: str | None = None) -> list[LibraryEntry]:
    """All library entries (shipped, then user), optionally of one kind."""
    rows = _shipped_entries() + _user_entries()
    if kind is not None:
        kinds = sorted({r.kind for r in rows})
        if kind not in kinds:
            raise input_error("kind", f"got {kind!r}", did_you_mean(kind, kinds))
        rows = [r for r in rows if r.kind == kind]
    return rows


def lookup(name: str) -> LibraryEntry:
    """One entry by name, with "did you mean" on a typo.

    Examples
    --------
    >>> lookup("water").kind
    'chromophore'
    """
    rows = entries()
    for row in rows:
        if row.name == name:
            return row
    raise input_error("name", f"nothing called {name!r} in the library", did_you_mean(name, [r.name for r in rows]))
