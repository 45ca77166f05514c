"""Make docs/tissue_optics_beyond_1000nm.png: the shipped absorption tables, where they join, and scattering.

Run from the repository root:  python3 docs/make_tissue_optics_plot.py
It prints the join figures quoted in docs/tissue_optics_beyond_1000nm.md and writes the PNG (a few seconds).
"""

from __future__ import annotations

import warnings
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from probeplan.model import tissue  # noqa: E402

OUT = Path(__file__).with_name("tissue_optics_beyond_1000nm.png")
JOIN_NM = 1000.0


def main() -> None:
    wl = np.arange(600.0, 1801.0, 1.0)
    fig, axes = plt.subplots(1, 3, figsize=(15, 4.6))

    ax = axes[0]
    for s, style in ((1.0, "-"), (0.0, "--")):
        ax.semilogy(wl, tissue.absorption("blood", wl, saturation=s), style, color="tab:red",
                    label=f"whole blood, S = {s:g}")
    hb_wl = np.arange(600.0, 1001.0, 1.0)
    for s, style in ((1.0, "-"), (0.0, "--")):
        hb = s * tissue.absorption("HbO2", hb_wl) + (1 - s) * tissue.absorption("Hb", hb_wl)
        ax.semilogy(hb_wl, hb, style, color="0.6", lw=1, label=f"haemoglobin alone (Prahl), S = {s:g}")
    ax.semilogy(wl, tissue.absorption("water", np.minimum(wl, 2000.0)), color="tab:blue", lw=1,
                label="pure water (Segelstein)")
    ax.axvline(JOIN_NM, color="k", lw=0.8, ls=":")
    ax.text(JOIN_NM + 10, 0.2, "join: Prahl + water | Bosschaart 2014", fontsize=8, rotation=90)
    ax.set(xlabel="wavelength (nm)", ylabel="μa (cm⁻¹)", title="Blood with its water")
    ax.legend(fontsize=7)

    ax = axes[1]
    fat_wl = np.arange(429.0, 1099.0, 1.0)
    ax.plot(fat_wl, tissue.absorption("fat", fat_wl), color="tab:orange", label="fat (van Veen 2005)")
    ax.axvspan(1098.0, 1700.0, color="0.9")
    ax.text(1150.0, 0.08, "no published fat table shipped:\nrefused 1098-1700 nm", fontsize=8)
    ax.set(xlabel="wavelength (nm)", ylabel="μa (cm⁻¹)", title="Fat", xlim=(420, 1700))
    ax.legend(fontsize=7)

    ax = axes[2]
    sweep = np.arange(400.0, 1701.0, 5.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for name in ("skin", "soft tissue", "mouse muscle", "mouse liver", "subcutaneous fat"):
            t = tissue.tissue_preset(name)
            lo, hi = t.scattering_range_nm
            mu_sp = t.mu_s_prime_per_cm(sweep, warn=False)
            line, = ax.semilogy(sweep, mu_sp, label=f"{name} (measured {lo:g}-{hi:g} nm)")
            bare = t.a_per_cm * (sweep / 500.0) ** -t.b
            ax.semilogy(sweep[sweep > hi], bare[sweep > hi], ":", color=line.get_color(), lw=1)
    ax.axhline(tissue.MU_S_PRIME_FLOOR_PER_CM, color="k", lw=0.8, ls="--")
    ax.set(xlabel="wavelength (nm)", ylabel="μs′ (cm⁻¹)",
           title="Scattering: law inside its range, rule beyond\n(dotted: the bare power law)")
    ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(OUT, dpi=110)

    print("| at 1000 nm | below the join (Prahl + 0.8 water) | above (Bosschaart 2014) |")
    print("| --- | --- | --- |")
    for s in (1.0, 0.0):
        below = float(tissue.absorption("blood", JOIN_NM - 1e-6, saturation=s))
        above = float(tissue.absorption("blood", JOIN_NM, saturation=s))
        print(f"| S = {s:g} | {below:.2f} cm⁻¹ | {above:.2f} cm⁻¹ |")
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
