"""The separate view: unmix an uploaded (or the demo) TIFF stack with reference spectra.

Uploads are written only into the session's private temporary folder under
sanitised names; every reading, unmixing and statistic is a library call.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import streamlit as st
from page_common import DEMO_DIR, FIGURE_DPI, captured_warnings, fmt, guard, safe_name, save_upload, session_folder, show_notes

__all__ = ["separate_view", "demo_inputs", "maps_png"]

def demo_inputs() -> tuple[Path, Path, Path | None] | None:
    """The demo stack, references and dark frame: shipped in demo_tissue/, or generated once per session."""
    names = ("stack.tif", "references.csv")
    if all((DEMO_DIR / n).is_file() for n in names):
        dark = DEMO_DIR / "dark.tif"
        return DEMO_DIR / names[0], DEMO_DIR / names[1], dark if dark.is_file() else None
    try:
        from probeplan.demo import generate_demo_files
    except ImportError:
        return None
    folder = session_folder() / "demo"
    if not all((folder / n).is_file() for n in names):
        notes: list[str] = []
        with captured_warnings(notes):
            generate_demo_files(folder)
    dark = folder / "dark.tif"
    return folder / names[0], folder / names[1], dark if dark.is_file() else None


def _default_rois() -> str:
    """ROI lines of the demo plan (an example to edit)."""
    try:
        from probeplan.study.plan import load_plan

        rois = load_plan(DEMO_DIR / "plan.toml").analysis.get("rois") or []
        return "\n".join(str(r) for r in rois)
    except (OSError, ValueError):
        return "tumour:20,20,44,44\nbackground:70,70,94,94"


def maps_png(maps: np.ndarray, titles: list[str], unit: str, *, cmap: str = "magma") -> bytes:
    """PNG of :func:`probeplan.report.figures.maps_figure`."""
    from probeplan.report.figures import maps_figure
    from probeplan.report.document import figure_png_bytes

    return figure_png_bytes(maps_figure(maps, titles, unit, cmap=cmap), dpi=FIGURE_DPI)


def _overlay(abundances: np.ndarray):
    """False-colour RGB overlay (probeplan.unmixing.overlay), first plane of Z/T stacks; None if it cannot be made."""
    from probeplan.unmixing import overlay

    try:
        rgb = overlay.overlay_rgb(abundances)
    except (ValueError, TypeError):
        return None
    while rgb.ndim > 3:
        rgb = rgb[0]
    return np.clip(rgb, 0.0, 1.0)


def _references(refs_source):
    """Reference spectra from a CSV path, or from control stacks: ``("controls", {name: path}, unlabelled, as_name)``."""
    from probeplan.unmixing.references import read_references_csv, references_from_control_files

    if isinstance(refs_source, tuple):
        _, controls, unlabelled, as_name = refs_source
        return references_from_control_files(controls, unlabelled, unlabelled_name=as_name or None)
    return read_references_csv(refs_source)


def _unmix(stack_path: Path, refs_path, dark_path: Path | None, method: str, gain: float, read_noise: float,
           offset: bool, rois_text: str, background: str) -> dict:
    """Unmix with :func:`probeplan.unmixing.pipeline.unmix_file` into the session folder (progress bar per block), read back."""
    import tifffile

    from probeplan.io import stacks as pio
    from probeplan.unmixing.pipeline import unmix_file

    notes: list[str] = []
    folder = session_folder() / "results"
    folder.mkdir(parents=True, exist_ok=True)
    stem = safe_name(stack_path.stem, "stack")
    with captured_warnings(notes):
        refs = _references(refs_path)
        with pio.open_stack(stack_path) as reader:
            n_rows = reader.info.n_rows
        bar = st.progress(0.0, text="unmixing…")
        done = [0]

        def advance(rows: int) -> None:
            done[0] += rows
            bar.progress(min(1.0, done[0] / max(1, n_rows)), text=f"unmixing… rows {done[0]} of {n_rows}")

        rois = [line.strip() for line in rois_text.splitlines() if line.strip()]
        res = unmix_file(stack_path, refs, folder / f"{stem}_abundance.ome.tif", method=method, dark_path=dark_path,
                         offset=offset, gain_e_per_count=gain, read_noise_e=read_noise, rois=rois or None,
                         roi_background=background or "background", progress=advance)
        bar.empty()
        abundances, info = pio.read_stack(res.outputs["abundance"])
        stderr, _ = pio.read_stack(res.outputs["stderr"])
        residual = tifffile.imread(res.outputs["residual"])  # one plane (Y, X): not a channel stack
    return {
        "names": list(res.qc["components"]), "abundances": abundances, "stderr": stderr,
        "residual": np.asarray(residual).reshape(abundances.shape[1:]),
        "qc": res.qc, "roi_rows": res.roi_rows or [], "outputs": res.outputs, "stack_name": stack_path.name,
        "notes": notes,
    }


def _downloads(result: dict) -> None:
    from probeplan.io.atomic import table_to_csv_text
    from probeplan.unmixing.roi import ROI_COLUMNS

    tif, err = Path(result["outputs"]["abundance"]), Path(result["outputs"]["stderr"])
    c = st.columns(3)
    c[0].download_button("Abundance maps (OME-TIFF)", tif.read_bytes(), file_name=tif.name, mime="image/tiff",
                         key="dl_abundance")
    c[1].download_button("Standard errors (OME-TIFF)", err.read_bytes(), file_name=err.name, mime="image/tiff",
                         key="dl_stderr")
    if result["roi_rows"]:
        stem = safe_name(Path(result["stack_name"]).stem, "stack")
        c[2].download_button("ROI statistics (CSV)", table_to_csv_text(result["roi_rows"], ROI_COLUMNS),
                             file_name=f"{stem}_roi.csv", mime="text/csv", key="dl_roi")


def separate_view() -> None:
    """Upload, unmix, look at the maps and ROI statistics, download."""
    st.header("Separate: unmix an image stack")
    st.caption("A multichannel TIFF or OME-TIFF stack (channels first) and the reference spectra of each probe in "
               "each channel (CSV: a 'channel' column, then one column per probe or autofluorescence) give an "
               "abundance map per probe with its standard error, and the residual of the fit.")
    ss = st.session_state
    ss.setdefault("w_sep_demo", False)
    ss.setdefault("w_sep_method", "nnls")
    ss.setdefault("w_sep_gain", 1.0)
    ss.setdefault("w_sep_read_noise", 0.0)
    ss.setdefault("w_sep_offset", False)
    ss.setdefault("w_sep_rois", _default_rois())
    ss.setdefault("w_sep_background", "background")
    demo = None
    with guard("demo data"):
        demo = demo_inputs()
    st.checkbox("use the demo stack and references (invented study)", key="w_sep_demo", disabled=demo is None,
                help=None if demo is not None else "The demo files are not available in this installation.")
    use_demo = bool(ss["w_sep_demo"]) and demo is not None
    c = st.columns(2)
    up_stack = c[0].file_uploader("image stack (TIFF / OME-TIFF)", type=["tif", "tiff"], key="up_stack",
                                  disabled=use_demo)
    ss.setdefault("w_sep_refs_from", "a CSV file")
    ss.setdefault("w_sep_unlabelled_as", "")
    c[1].radio("reference spectra from", ["a CSV file", "control stacks"], key="w_sep_refs_from", horizontal=True,
               disabled=use_demo, help="Control stacks: one stack per probe holding only that probe (the file name, "
               "without its extension, names the probe) and one unlabelled stack.")
    from_controls = ss["w_sep_refs_from"] == "control stacks" and not use_demo
    up_refs = up_controls = up_unlabelled = None
    if from_controls:
        up_controls = c[1].file_uploader("single-probe control stacks (one per probe)", type=["tif", "tiff"],
                                         key="up_controls", accept_multiple_files=True)
        up_unlabelled = c[1].file_uploader("unlabelled control stack", type=["tif", "tiff"], key="up_unlabelled")
        c[1].text_input("also unmix the unlabelled control's spectrum as (optional, e.g. autofluorescence)",
                        key="w_sep_unlabelled_as")
    else:
        up_refs = c[1].file_uploader("reference spectra (CSV)", type=["csv", "txt"], key="up_refs", disabled=use_demo)
    c = st.columns(4)
    c[0].selectbox("method", ["nnls", "ls", "wls"], key="w_sep_method",
                   format_func={"nnls": "non-negative least squares", "ls": "least squares",
                                "wls": "Poisson-weighted least squares"}.get)
    c[1].number_input("camera gain (e⁻/count)", min_value=1e-6, max_value=1e6, step=0.1, key="w_sep_gain")
    c[2].number_input("camera read noise (e⁻ rms)", min_value=0.0, max_value=1e4, step=0.5, key="w_sep_read_noise")
    c[3].checkbox("fit a constant offset per channel", key="w_sep_offset")
    c = st.columns([3, 1])
    c[0].text_area("regions of interest, one per line: name:x0,y0,x1,y1 (pixels; x0, y0 included, x1, y1 excluded)",
                   key="w_sep_rois", height=90)
    c[1].text_input("background region (for target-to-background ratios)", key="w_sep_background")
    run = st.button("Unmix", type="primary", key="btn_unmix")
    if run:
        ss.pop("unmix_result", None)
        with guard("unmixing"):
            dark = None
            if use_demo:
                stack_path, refs_path, dark = demo
            else:
                from probeplan.errors import input_error

                if up_stack is None or (not from_controls and up_refs is None):
                    raise input_error("upload", "a stack and a reference spectra CSV are both needed",
                                      "upload both files, or tick 'use the demo'")
                if from_controls and (not up_controls or up_unlabelled is None):
                    raise input_error("upload", "control stacks need at least one single-probe stack and the "
                                      "unlabelled stack", "upload both kinds, or use a reference spectra CSV")
                stack_path = save_upload(up_stack.getvalue(), up_stack.name or "stack.tif", sub="uploads")
                if from_controls:
                    controls = {}
                    for f in up_controls:
                        saved = save_upload(f.getvalue(), f.name or "control.tif", sub="controls")
                        controls[Path(f.name or saved.name).name.split(".")[0]] = saved
                    unlabelled = save_upload(up_unlabelled.getvalue(), up_unlabelled.name or "unlabelled.tif",
                                             sub="controls")
                    refs_path = ("controls", controls, unlabelled, str(ss["w_sep_unlabelled_as"]).strip())
                else:
                    refs_path = save_upload(up_refs.getvalue(), up_refs.name or "references.csv", sub="uploads")
            ss["unmix_result"] = _unmix(stack_path, refs_path, dark, str(ss["w_sep_method"]), float(ss["w_sep_gain"]),
                                        float(ss["w_sep_read_noise"]), bool(ss["w_sep_offset"]), str(ss["w_sep_rois"]),
                                        str(ss["w_sep_background"]).strip())
    result = ss.get("unmix_result")
    if result is None:
        return
    with guard("results"):
        qc = result["qc"]
        st.subheader(f"Results for {result['stack_name']}")
        c = st.columns(4)
        c[0].metric("condition number of the references", fmt(qc["condition_number"]))
        c[1].metric("pixels", f"{qc['n_pixels']:,}")
        c[2].metric("saturated or missing pixels", f"{qc['n_saturated'] + qc['n_invalid']:,}")
        c[3].metric("residual RMS (counts)", fmt(qc["residual_rms"]["rms"]))
        st.markdown("**Abundance maps**")
        st.image(maps_png(result["abundances"], result["names"], "abundance (counts, all channels)"),
                 caption="Abundance of each component (reference spectra normalised to unit sum over channels).",
                 width="content")
        overlay = _overlay(result["abundances"])
        tabs = st.tabs(["standard error", "residual", "false-colour overlay"])
        with tabs[0]:
            st.image(maps_png(result["stderr"], [f"{n} standard error" for n in result["names"]], "counts",
                              cmap="viridis"), width="content")
        with tabs[1]:
            st.image(maps_png(result["residual"][None], ["residual RMS over channels"], "counts", cmap="viridis"),
                     width="content")
        with tabs[2]:
            if overlay is not None:
                st.image(overlay, clamp=True, width="content",
                         caption="Each component in its own colour, scaled to its 99.5th percentile.")
        if result["roi_rows"]:
            st.markdown("**Regions of interest** (mean ± SD of the abundance; TBR against the background region)")
            shown = {"roi": "region", "component": "component", "n_pixels": "pixels", "n_nan": "pixels left out (NaN)",
                     "mean": "mean abundance (counts)", "sd": "SD (counts)", "tbr": "target-to-background ratio"}
            st.dataframe([{shown.get(k, k): (fmt(v) if isinstance(v, float) else v) for k, v in r.items()}
                          for r in result["roi_rows"]], hide_index=True, width="stretch")
        _downloads(result)
        show_notes(result["notes"], title="Unmixing notes")
