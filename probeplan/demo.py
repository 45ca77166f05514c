"""The demo study: the whole job on the invented scenario in ``demo_tissue/``.

:func:`run_demo` writes every output into one folder and returns what it wrote.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from probeplan import RESEARCH_USE_CAUTION
from probeplan.errors import input_error
from probeplan.outputs import write_csv_atomic, write_text_atomic

__all__ = ["DemoResult", "run_demo", "DEFAULT_DEMO_OUT"]

#: Default output folder of ``probeplan demo`` (relative to the working folder).
DEFAULT_DEMO_OUT = "probeplan-demo"


@dataclass
class DemoResult:
    """What the demo wrote: the output folder, the main report and every file."""

    out_dir: Path
    report: Path
    files: list[Path] = field(default_factory=list)


def _prepare(out_dir: Path) -> Path:
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise input_error("--out", f"{str(out_dir)!r} is a file", "give a folder path")
    out_dir.mkdir(parents=True, exist_ok=True)
    return out_dir


def run_demo(out_dir: str | Path = DEFAULT_DEMO_OUT) -> DemoResult:
    """Run the demo study end to end into ``out_dir`` (created if needed)."""
    from probeplan import tissue

    out = _prepare(Path(out_dir))
    files: list[Path] = []
    wavelengths = np.arange(650.0, 1001.0, 10.0)
    rows = []
    for name in ("skin", "mouse muscle", "soft tissue"):
        mu_a, mu_sp = tissue.optical_properties(name, wavelengths)
        rows += [
            {"tissue": name, "wavelength_nm": float(w), "mu_a_per_cm": float(a), "mu_s_prime_per_cm": float(s)}
            for w, a, s in zip(wavelengths, mu_a, mu_sp, strict=True)
        ]
    files.append(write_csv_atomic(out / "tissue_optics.csv", rows))
    report = write_text_atomic(
        out / "README.txt",
        f"probeplan demo output\n\n{RESEARCH_USE_CAUTION}\n\n"
        "tissue_optics.csv: absorption and reduced scattering of the demo tissues, 650-1000 nm.\n",
    )
    files.append(report)
    return DemoResult(out, report, files)
