"""Monte Carlo reference values for tests/test_transport_tables.py (transport_mc_reference.csv).

Runs the package's own photon-packet Monte Carlo (probeplan.model.montecarlo, numba engine,
itself checked against iadpython in tests/test_montecarlo.py) at a spread of points over the
range the transport model claims: mu_a/mu_s' 0.001-0.5, g 0.8-0.95, n 1.33-1.45, depths
0.5-10 mm.  Each row gives the Monte Carlo value, its batch-means standard error, the seed and
the packet count.  About 15 minutes on two cores:

    python3 tests/data/make_transport_reference.py

Quantities
----------
escape        fraction of an isotropic point source's power leaving the surface
exitance_bin  exitance averaged over the disc rho < rho_max_mm above the source, per mm^2
fwhm_mm       FWHM of the exitance profile (a smooth fit of ln J against rho^2 near the axis, no
              transport model involved; see _fwhm)
broad_beam    fluence per unit irradiance of a broad collimated beam, averaged over a 0.1 mm bin
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np

from probeplan.model.montecarlo import Layer, radial_profile_peak_and_fwhm, simulate_point_source, simulate_slab

OUT = Path(__file__).with_name("transport_mc_reference.csv")
SEED = 7321
#: (g, n, mu_a /cm, mu_s' /cm, depth mm, packets): point sources
POINTS = [
    (0.9, 1.4, 1.03, 5.53, 1.0, 360_000),
    (0.9, 1.4, 1.03, 5.53, 3.0, 720_000),
    (0.9, 1.4, 1.03, 5.53, 5.0, 1_200_000),
    (0.9, 1.4, 0.3, 8.0, 3.0, 360_000),
    (0.8, 1.33, 2.0, 4.0, 0.5, 360_000),
    (0.8, 1.33, 2.0, 4.0, 2.0, 720_000),
    (0.8, 1.33, 2.0, 4.0, 4.0, 1_800_000),
    (0.95, 1.45, 0.01, 10.0, 0.5, 240_000),
    (0.95, 1.45, 0.01, 10.0, 5.0, 240_000),
    (0.9, 1.4, 0.25, 5.0, 10.0, 600_000),
    (0.85, 1.37, 3.0, 10.0, 6.0, 2_400_000),
    (0.9, 1.4, 0.15, 15.0, 2.0, 240_000),
    (0.93, 1.42, 0.6, 6.0, 8.0, 1_200_000),
    (0.95, 1.33, 5.0, 10.0, 0.5, 600_000),
    (0.8, 1.45, 0.005, 5.0, 10.0, 480_000),
    (0.95, 1.33, 1.5, 5.0, 10.0, 1_200_000),
]
#: (g, n, mu_a /cm, mu_s' /cm, depths mm, packets): broad collimated beams
BEAMS = [
    (0.9, 1.4, 0.3, 8.0, (0.125, 0.5, 1.0, 3.0, 6.0, 10.0), 60_000),
    (0.95, 1.45, 2.5, 5.0, (0.5, 1.0, 2.0, 4.0), 60_000),
    (0.8, 1.33, 0.1, 20.0, (0.5, 2.0, 5.0, 10.0), 40_000),
    (0.9, 1.4, 1.5, 10.0, (0.5, 1.0, 3.0, 6.0), 80_000),
]
_BIN_MM = 0.1


def _layer(g, n, mu_a, mu_sp):
    return Layer(math.inf, mu_a, mu_sp / (1.0 - g), g, n)


def _fwhm(res):
    """FWHM of the radial exitance profile and its standard error, without any transport model
    (:func:`probeplan.model.montecarlo.radial_profile_peak_and_fwhm`, 200 coefficient draws)."""
    rel = res.radial_reflectance_per_mm2_std / np.maximum(res.radial_reflectance_per_mm2, 1e-300)
    _, fwhm, _, fwhm_se = radial_profile_peak_and_fwhm(res.rho_mm, res.radial_reflectance_per_mm2, rel, draws=200)
    return fwhm, fwhm_se


def _point_rows(i: int) -> list[dict]:
    """The escape, disc exitance and FWHM rows of point source ``i`` of POINTS."""
    g, n, mu_a, mu_sp, depth, packets = POINTS[i]
    step = 0.05 * depth + 0.02
    edges = np.arange(0.0, 3.0 * depth + 3.0 + step / 2, step)
    seed = SEED + i
    res = simulate_point_source([_layer(g, n, mu_a, mu_sp)], depth, packets, seed=seed, rho_bins_mm=edges,
                                engine="numba")
    base = dict(g=g, n=n, mu_a_per_cm=mu_a, mu_s_prime_per_cm=mu_sp, depth_mm=depth, seed=seed, packets=packets)
    rows = [dict(base, quantity="escape", rho_max_mm=0.0, value=res.escape, se=res.escape_std)]
    # exitance averaged over the disc rho < 0.25 d (five bins), with its error from the batch spread
    k = 5
    area = np.pi * edges[1:] ** 2 - np.pi * edges[:-1] ** 2
    power = np.sum(res.radial_reflectance_per_mm2[:k] * area[:k])
    power_se = math.sqrt(np.sum((res.radial_reflectance_per_mm2_std[:k] * area[:k]) ** 2))
    disc = np.pi * edges[k] ** 2
    rows.append(dict(base, quantity="exitance_bin", rho_max_mm=float(edges[k]), value=power / disc,
                     se=power_se / disc))
    fwhm, fwhm_se = _fwhm(res)
    rows.append(dict(base, quantity="fwhm_mm", rho_max_mm=0.0, value=fwhm, se=fwhm_se))
    print(i, g, n, mu_a, mu_sp, depth, res.escape, res.escape_std, fwhm, flush=True)
    return rows


def main() -> None:
    # one point source per process, two at a time (the packet Monte Carlo runs on one core)
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(max_workers=2) as pool:
        rows = [row for point in pool.map(_point_rows, range(len(POINTS))) for row in point]
    for i, (g, n, mu_a, mu_sp, depths, packets) in enumerate(BEAMS):
        edges = np.unique(np.concatenate([[d - _BIN_MM / 2, d + _BIN_MM / 2] for d in depths]))
        seed = SEED + 100 + i
        res = simulate_slab([_layer(g, n, mu_a, mu_sp)], packets, seed=seed, depth_bins_mm=edges, rho_bins_mm=[],
                            engine="numba")
        for d in depths:
            b = int(np.searchsorted(edges, d)) - 1
            rows.append(dict(g=g, n=n, mu_a_per_cm=mu_a, mu_s_prime_per_cm=mu_sp, depth_mm=d, seed=seed,
                             packets=packets, quantity="broad_beam", rho_max_mm=0.0, value=float(res.fluence[b]),
                             se=float(res.fluence_std[b])))
        print("beam", i, res.fluence, flush=True)
    with OUT.open("w", newline="") as fh:
        fh.write("# Monte Carlo reference values (probeplan.model.montecarlo, numba engine, batch-means standard errors)\n")
        fh.write("# generated by tests/data/make_transport_reference.py; columns: see its docstring\n")
        writer = csv.DictWriter(fh, fieldnames=["quantity", "g", "n", "mu_a_per_cm", "mu_s_prime_per_cm", "depth_mm",
                                                "rho_max_mm", "value", "se", "seed", "packets"])
        writer.writeheader()
        for row in rows:
            writer.writerow({k: (f"{v:.6g}" if isinstance(v, float) else v) for k, v in row.items()})


if __name__ == "__main__":
    main()
