"""Make docs/transport_models.png: diffusion, the Monte Carlo tables and Monte Carlo side by side.

Run from the repository root:  python3 docs/make_transport_models_plot.py
Reads the precomputed Monte Carlo reference values in tests/data/transport_mc_reference.csv (made by
tests/data/make_transport_reference.py) and prints the table quoted in docs/transport_models.md.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from probeplan.model import transport as tr  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]


def _reference():
    """tests/data/transport_reference.py: the reference rows and the model's value for each, as the test uses them."""
    import importlib.util

    spec = importlib.util.spec_from_file_location("_transport_reference", ROOT / "tests" / "data" /
                                                  "transport_reference.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=str(Path(__file__).with_name("transport_models.png")))
    args = parser.parse_args(argv)
    ref = _reference()
    rows = ref.reference_rows()
    fig, axes = plt.subplots(1, 2, figsize=(10.0, 4.0))
    # (a) escape against depth, mu_a = 1.03, mu_s' = 5.53 /cm (about 1300 nm), g 0.9, n 1.4
    depth = np.linspace(0.5, 6.0, 120)
    ax = axes[0]
    ax.semilogy(depth, tr.point_source_escape(depth, 1.03, 5.53, model="diffusion"), "k--", label="diffusion")
    ax.semilogy(depth, tr.point_source_escape(depth, 1.03, 5.53), "tab:blue", label="Monte Carlo tables (default)")
    pts = [r for r in rows if r["quantity"] == "escape" and r["mu_a_per_cm"] == 1.03]
    ax.errorbar([r["depth_mm"] for r in pts], [r["value"] for r in pts], yerr=[2 * r["se"] for r in pts], fmt="o",
                color="tab:red", label="Monte Carlo (packets)")
    ax.set_xlabel("source depth (mm)")
    ax.set_ylabel("fraction escaping")
    ax.set_title("point source, μa/μs′ = 0.19, g = 0.9")
    ax.legend(fontsize=8)
    # (b) every reference point: model / Monte Carlo
    ax = axes[1]
    markers = {"escape": "o", "exitance_bin": "s", "fwhm_mm": "^", "broad_beam": "D"}
    print("| quantity | g | n | μa/μs′ | depth (mm) | Monte Carlo | ± | diffusion / MC | tables / MC |")
    print("| --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    for r in rows:
        ratio = r["mu_a_per_cm"] / r["mu_s_prime_per_cm"]
        dif = ref.model_value(r, "diffusion") / r["value"]
        tab = ref.model_value(r, "auto") / r["value"]
        m = markers[r["quantity"]]
        ax.semilogx(ratio * (1.0 + 0.03 * r["depth_mm"]), dif, m, mfc="none", mec="0.4")
        ax.semilogx(ratio * (1.0 + 0.03 * r["depth_mm"]), tab, m, color="tab:blue")
        print(f"| {r['quantity']} | {r['g']:g} | {r['n']:g} | {ratio:.3g} | {r['depth_mm']:g} | {r['value']:.4g} | "
              f"{r['se']:.2g} | {dif:.3f} | {tab:.3f} |")
    ax.axhspan(0.95, 1.05, color="tab:blue", alpha=0.1)
    ax.axhline(1.0, color="k", lw=0.5)
    ax.set_xlabel("μa/μs′ (points spread by depth)")
    ax.set_ylabel("model / Monte Carlo")
    ax.set_title("open: diffusion; filled: tables; band ±5 %")
    for q, m in markers.items():
        ax.plot([], [], m, color="tab:blue", label=q)
    ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(args.out, dpi=110)
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
