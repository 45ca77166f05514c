"""The Monte Carlo reference values of the transport model (transport_mc_reference.csv) and the model's value for a row.

Shared by tests/test_transport_tables.py (the accuracy test) and docs/make_transport_models_plot.py
(the figure and table of docs/transport_models.md), so that both compare the same quantity.  The CSV
is made by make_transport_reference.py beside it (seeds, packet counts and standard errors included).
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
from scipy import integrate

from probeplan.model import transport as tr

REFERENCE = Path(__file__).with_name("transport_mc_reference.csv")


def reference_rows() -> list[dict]:
    """Every row of the reference CSV, numbers as floats (the ``quantity`` column as text)."""
    with REFERENCE.open() as fh:
        lines = [line for line in fh if not line.startswith("#")]
    return [{k: (v if k == "quantity" else float(v)) for k, v in row.items()} for row in csv.DictReader(lines)]


def model_value(row: dict, model: str) -> float:
    """The transport model's value of the row's quantity, computed as the Monte Carlo tallied it.

    ``escape``: the escape fraction; ``fwhm_mm``: the blur FWHM; ``exitance_bin``: the exitance averaged
    over the disc of radius ``rho_max_mm``; ``broad_beam``: the fluence averaged over ±0.05 mm.
    """
    g, n, mua, musp, d = row["g"], row["n"], row["mu_a_per_cm"], row["mu_s_prime_per_cm"], row["depth_mm"]
    q = row["quantity"]
    if q == "escape":
        return float(tr.point_source_escape(d, mua, musp, n, g=g, model=model))
    if q == "fwhm_mm":
        return float(tr.point_source_blur_fwhm_mm(d, mua, musp, n, g=g, model=model))
    if q == "exitance_bin":
        r_max = row["rho_max_mm"]
        power = integrate.quad(lambda r: 2 * math.pi * r * float(
            tr.point_source_exitance_per_mm2(r, d, mua, musp, n, g=g, model=model)), 0.0, r_max)[0]
        return power / (math.pi * r_max**2)
    if q == "broad_beam":
        z = np.linspace(d - 0.05, d + 0.05, 41)
        return float(np.trapezoid(tr.broad_beam_fluence(z, mua, musp, n, g=g, model=model), z) / 0.1)
    raise ValueError(f"unknown reference quantity {q!r}")

