"""Make docs/diffusion_vs_montecarlo.png: diffusion theory against the Monte Carlo reference.

Run from the repository root:  python3 docs/make_transport_plot.py
It prints the numbers quoted in docs/diffusion_vs_montecarlo.md (Markdown tables) and writes the PNG.
Takes about 30 s on two cores (numba engine, fixed seeds).
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from probeplan.model import transport as tr  # noqa: E402
from probeplan.model.montecarlo import Layer, simulate_point_source, simulate_slab  # noqa: E402

MU_A, MU_SP, N_REL = 0.1, 10.0, 1.4  # cm^-1, cm^-1, tissue/air
MFP_MM = 10.0 / (MU_A + MU_SP)
DEPTHS_MFP = np.array([0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0])
ANISOTROPIES = {0.0: 30_000, 0.9: 15_000}  # g -> photons per point-source run
PENCIL = {0.0: 200_000, 0.9: 60_000}  # g -> photons for the pencil beam


def _layers(g: float) -> list[Layer]:
    return [Layer(math.inf, MU_A, MU_SP / (1.0 - g), g, N_REL)]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=str(Path(__file__).with_name("diffusion_vs_montecarlo.png")))
    args = parser.parse_args(argv)

    fig, axes = plt.subplots(2, 2, figsize=(9.0, 6.6))
    colours = {0.0: "tab:blue", 0.9: "tab:orange"}
    depth_mm = DEPTHS_MFP * MFP_MM
    fine = np.linspace(0.0, DEPTHS_MFP[-1] * MFP_MM, 200)
    axes[0, 0].plot(fine / MFP_MM, tr.point_source_escape(fine, MU_A, MU_SP, N_REL, model="diffusion"), "k-", label="diffusion (exact A)")

    print("| depth (mfp) | diffusion | MC g=0 | ratio | MC g=0.9 | ratio |")
    print("| --- | --- | --- | --- | --- | --- |")
    escape = {}
    for g, photons in ANISOTROPIES.items():
        escape[g] = [
            simulate_point_source(_layers(g), float(d), photons, engine="numba", seed=100 + i) for i, d in enumerate(depth_mm)
        ]
    diffusion = tr.point_source_escape(depth_mm, MU_A, MU_SP, N_REL, model="diffusion")
    for i, d in enumerate(DEPTHS_MFP):
        a, b = escape[0.0][i], escape[0.9][i]
        print(
            f"| {d:g} | {diffusion[i]:.4f} | {a.escape:.4f} ± {a.escape_std:.4f} | {diffusion[i] / a.escape:.3f} "
            f"| {b.escape:.4f} ± {b.escape_std:.4f} | {diffusion[i] / b.escape:.3f} |"
        )
    for g in ANISOTROPIES:
        values = np.array([r.escape for r in escape[g]])
        errors = np.array([r.escape_std for r in escape[g]])
        axes[0, 0].errorbar(DEPTHS_MFP, values, 2 * errors, fmt="o", ms=4, color=colours[g], label=f"Monte Carlo g={g:g}")
        axes[0, 1].errorbar(
            DEPTHS_MFP, diffusion / values, 2 * errors * diffusion / values**2, fmt="o-", ms=4, color=colours[g], label=f"g={g:g}"
        )
    axes[0, 0].set(xlabel="source depth (transport mean free paths)", ylabel="escaping fraction", title="Point source: escape")
    axes[0, 0].legend(fontsize=8)
    axes[0, 1].set(
        xlabel="source depth (transport mean free paths)", ylabel="diffusion / Monte Carlo", title="Point source: escape ratio"
    )

    print("\n| rho (mm) | R(rho) diffusion/MC g=0 | g=0.9 |")
    print("| --- | --- | --- |")
    pencil = {}
    rho_edges = np.arange(0.0, 10.01, 0.5)
    depth_edges = np.arange(0.0, 8.01, 0.25)
    for g, photons in PENCIL.items():
        pencil[g] = simulate_slab(_layers(g), photons, engine="numba", seed=7, rho_bins_mm=rho_edges, depth_bins_mm=depth_edges)
    ratio_r = {}
    ratio_f = {}
    for g, res in pencil.items():
        model = tr.spatially_resolved_reflectance_per_mm2(res.rho_mm, MU_A, MU_SP, N_REL)
        ratio_r[g] = model / res.radial_reflectance_per_mm2
        err = ratio_r[g] * res.radial_reflectance_per_mm2_std / res.radial_reflectance_per_mm2
        axes[1, 0].errorbar(res.rho_mm / MFP_MM, ratio_r[g], 2 * err, fmt="o-", ms=3, color=colours[g], label=f"g={g:g}")
        flu = tr.broad_beam_fluence(res.depth_mm, MU_A, MU_SP, N_REL, model="diffusion")
        ratio_f[g] = flu / res.fluence
        err = ratio_f[g] * res.fluence_std / res.fluence
        axes[1, 1].errorbar(res.depth_mm / MFP_MM, ratio_f[g], 2 * err, fmt="o-", ms=3, color=colours[g], label=f"g={g:g}")
    rho = pencil[0.0].rho_mm
    for k in range(0, rho.size, 2):
        print(f"| {rho[k]:.2f} | {ratio_r[0.0][k]:.3f} | {ratio_r[0.9][k]:.3f} |")
    print("\n| depth (mm) | fluence diffusion/MC g=0 | g=0.9 |")
    print("| --- | --- | --- |")
    dep = pencil[0.0].depth_mm
    for k in range(0, dep.size, 4):
        print(f"| {dep[k]:.3f} | {ratio_f[0.0][k]:.3f} | {ratio_f[0.9][k]:.3f} |")
    for g, res in pencil.items():
        print(
            f"\ntotal diffuse reflectance g={g:g}: MC {res.reflectance:.4f} ± {res.reflectance_std:.4f}; "
            f"diffusion polynomial A {float(tr.diffuse_reflectance(MU_A, MU_SP, N_REL)):.4f}, "
            f"exact A {float(tr.diffuse_reflectance(MU_A, MU_SP, N_REL, method='exact')):.4f}"
        )

    axes[1, 0].set(
        xlabel="distance from the beam (transport mean free paths)",
        ylabel="diffusion / Monte Carlo",
        title="Pencil beam: R(ρ) ratio",
        ylim=(0.0, 2.0),
    )
    axes[1, 1].set(
        xlabel="depth (transport mean free paths)", ylabel="diffusion / Monte Carlo", title="Broad beam: fluence ratio"
    )
    for ax in (axes[0, 1], axes[1, 0], axes[1, 1]):
        ax.axhline(1.0, color="k", lw=0.8)
        ax.axhspan(0.9, 1.1, color="0.9", zorder=0)
        ax.axvline(2.0, color="0.5", ls=":", lw=0.8)
        ax.legend(fontsize=8)
    fig.suptitle(
        f"Semi-infinite medium, μa {MU_A:g} cm⁻¹, μs′ {MU_SP:g} cm⁻¹, n {N_REL:g} in air "
        f"(1 mfp = {MFP_MM:.2f} mm); grey band ±10 %, error bars 2σ",
        fontsize=9,
    )
    fig.tight_layout()
    fig.savefig(args.out, dpi=80)
    print(f"\nwrote {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
