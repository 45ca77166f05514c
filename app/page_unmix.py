"""The unmix view: unmix an uploaded (or the demo) TIFF stack, read the maps, draw regions on them.

Uploads are written only into the session's private temporary folder under sanitised
names; every reading, unmixing, region mask and statistic is a library call
(:mod:`probeplan.unmixing`).  Regions are drawn on an interactive chart of a map
(box → rectangle or ellipse, lasso → polygon), named, listed, saved to and loaded
from the ROI file (:mod:`probeplan.unmixing.roifile`).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import streamlit as st

from app.page_common import (
    DEMO_DIR,
    FIGURE_DPI,
    captured_warnings,
    fmt,
    guard,
    safe_name,
    save_upload,
    session_folder,
    show_notes,
)

__all__ = ["unmix_view", "demo_inputs", "maps_png", "composite_png", "CHART_MAX_SIDE"]

#: The drawing chart shows the map downsampled to at most this many pixels a side (coordinates are scaled back).
CHART_MAX_SIDE = 200
_UNIT = "counts"


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


def _demo_shapes() -> list:
    """The demo plan's rectangles as drawn regions (an example to edit)."""
    from probeplan.study.plan import load_plan
    from probeplan.unmixing.roi import parse_rectangle
    from probeplan.unmixing.shapes import rectangle_from_spec

    try:
        rois = load_plan(DEMO_DIR / "plan.toml").analysis.get("rois") or []
        return [rectangle_from_spec(parse_rectangle(str(r))) for r in rois]
    except (OSError, ValueError):
        return []


@st.cache_data(show_spinner=False, max_entries=24)
def maps_png(maps: np.ndarray, titles: list[str], unit: str, *, cmap: str = "magma", pixel_size_um=None,
             rois=None, limits=None) -> bytes:
    """PNG of :func:`probeplan.report.figures.maps_figure` (small multiples, colour bar each, scale bar, ROIs)."""
    from probeplan.report.document import figure_png_bytes
    from probeplan.report.figures import maps_figure

    return figure_png_bytes(maps_figure(maps, titles, unit, cmap=cmap, pixel_size_um=pixel_size_um, rois=rois,
                                        limits=limits), dpi=FIGURE_DPI)


@st.cache_data(show_spinner=False, max_entries=24)
def composite_png(abundances: np.ndarray, names: list[str], limits, *, pixel_size_um=None, rois=None) -> bytes:
    """PNG of the colour-blind-safe composite (:func:`probeplan.report.figures.composite_figure`)."""
    from probeplan.report.document import figure_png_bytes
    from probeplan.report.figures import composite_figure

    return figure_png_bytes(composite_figure(abundances, names, limits=limits, pixel_size_um=pixel_size_um,
                                             rois=rois), dpi=FIGURE_DPI)


def _references(refs_source):
    """Reference spectra from a CSV path, or from control stacks: ``("controls", {name: path}, unlabelled, as_name)``."""
    from probeplan.unmixing.references import read_references_csv, references_from_control_files

    if isinstance(refs_source, tuple):
        _, controls, unlabelled, as_name = refs_source
        return references_from_control_files(controls, unlabelled, unlabelled_name=as_name or None)
    return read_references_csv(refs_source)


def _unmix(stack_path: Path, refs_path, dark_path: Path | None, method: str, gain: float, read_noise: float,
           offset: bool) -> dict:
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

        res = unmix_file(stack_path, refs, folder / f"{stem}_abundance.ome.tif", method=method, dark_path=dark_path,
                         offset=offset, gain_e_per_count=gain, read_noise_e=read_noise, progress=advance)
        bar.empty()
        abundances, info = pio.read_stack(res.outputs["abundance"])
        stderr, _ = pio.read_stack(res.outputs["stderr"])
        residual = tifffile.imread(res.outputs["residual"])  # one plane (Y, X): not a channel stack
    while abundances.ndim > 3:  # Z/T stacks: the page shows the first plane
        abundances, stderr = abundances[:, 0], stderr[:, 0]
    return {
        "names": list(res.qc["components"]), "abundances": np.asarray(abundances, dtype=np.float64),
        "stderr": np.asarray(stderr, dtype=np.float64),
        "residual": np.asarray(residual, dtype=np.float64).reshape(-1, *abundances.shape[-2:])[0],
        "qc": res.qc, "outputs": res.outputs, "stack_name": stack_path.name,
        "pixel_size_um": info.pixel_size_um, "notes": notes,
    }


# --------------------------------------------------------------------------- regions


def _regions() -> list:
    return st.session_state.setdefault("unmix_regions", [])


def _region_names() -> list[str]:
    return [r.name for r in _regions()]


def _add_region(shape) -> None:
    regions = [r for r in _regions() if r.name != shape.name]
    regions.append(shape)
    st.session_state["unmix_regions"] = regions
    st.session_state.pop("unmix_roi_rows", None)
    if shape.name == "background" and st.session_state.get("w_roi_background", "(none)") == "(none)":
        st.session_state["w_roi_background"] = "background"


def _image_size(result: dict) -> tuple[int, int]:
    ny, nx = result["abundances"].shape[-2:]
    return int(nx), int(ny)


@st.cache_data(show_spinner=False, max_entries=8)
def _chart_map(values: np.ndarray, factor: int) -> np.ndarray:
    from probeplan.unmixing.overlay import downsample_mean

    return downsample_mean(values, factor)


def _draw_chart(result: dict, component: int) -> tuple[dict | None, int]:
    """The interactive map to draw on; returns (selection, downsampling factor)."""
    import plotly.graph_objects as go

    from probeplan.unmixing.overlay import overlay_factor

    a = result["abundances"][component]
    factor = overlay_factor(a.shape, CHART_MAX_SIDE)
    small = _chart_map(a, factor)
    ny, nx = small.shape
    finite = small[np.isfinite(small)]
    top = float(np.percentile(finite, 99.5)) if finite.size else 1.0
    # The map as an image coloured by matplotlib's magma over 0..99.5th percentile, as in the report's figures
    # (the colour bar is on the maps above); plotly draws it pixel for pixel.
    from matplotlib import colormaps

    lo = min(0.0, float(finite.min())) if finite.size else 0.0
    hi = top if top > lo else lo + 1.0
    norm = np.clip((np.nan_to_num(small, nan=lo) - lo) / (hi - lo), 0.0, 1.0)
    rgb = (colormaps["magma"](norm)[..., :3] * 255).astype(np.uint8)
    # the chart's axes use the ROI file's coordinates: origin at the image's top-left corner, so pixel i is
    # centred on i + 0.5 (x0, y0) and a selection needs no half-pixel shift (offset=0 below)
    fig = go.Figure(go.Image(z=rgb, x0=0.5, y0=0.5, hoverinfo="skip"))
    # An invisible point on every (other) pixel: plotly's box and lasso select act on points, not on heatmaps.
    step = max(1, round(max(nx, ny) / 100))
    gy, gx = np.mgrid[0:ny:step, 0:nx:step] + 0.5
    fig.add_trace(go.Scattergl(x=gx.ravel(), y=gy.ravel(), mode="markers", marker={"size": 4, "opacity": 0.0},
                               hoverinfo="skip", showlegend=False))
    for s in _regions():
        x0, y0, x1, y1 = (v / factor for v in s.box)
        if s.shape == "polygon":
            xs = [v / factor for v in (*s.x, s.x[0])]
            ys = [v / factor for v in (*s.y, s.y[0])]
            fig.add_trace(go.Scatter(x=xs, y=ys, mode="lines", line={"color": "white", "dash": "dash"},
                                     hoverinfo="skip", showlegend=False))
        else:
            fig.add_shape(type="rect" if s.shape == "rectangle" else "circle", x0=x0, y0=y0, x1=x1, y1=y1,
                          line={"color": "white", "dash": "dash"})
        fig.add_annotation(x=x0, y=y0, text=s.name, showarrow=False, xanchor="left", yanchor="bottom",
                           font={"color": "white", "size": 11}, bgcolor="rgba(0,0,0,0.45)")
    unit = "pixel" if factor == 1 else f"pixel / {factor}"
    fig.update_yaxes(autorange="reversed", scaleanchor="x", constrain="domain",
                     title=f"y ({unit}, from the image's top edge)")
    fig.update_xaxes(constrain="domain", title=f"x ({unit}, from the image's left edge)")
    fig.update_layout(dragmode="select", height=540, margin={"l": 60, "r": 10, "t": 40, "b": 50},
                      title={"text": f"{result['names'][component]}: drag a box, or pick the lasso in the toolbar",
                             "font": {"size": 13}})
    event = st.plotly_chart(fig, key="roi_chart", on_select="rerun", selection_mode=("box", "lasso"), theme=None,
                            config={"displaylogo": False, "modeBarButtonsToRemove": ["toImage"]})
    selection = None
    if event is not None:
        selection = dict(event.get("selection", {}) if isinstance(event, dict) else getattr(event, "selection", {}))
    return selection, factor


def _load_roi_file() -> None:
    """Replace the regions by those of the uploaded ROI file (a callback: runs before the widgets are drawn)."""
    from probeplan.errors import InputError
    from probeplan.unmixing.roifile import parse_roi_text
    from probeplan.unmixing.shapes import shapes_to_rois

    ss = st.session_state
    up, result = ss.get("up_rois"), ss.get("unmix_result")
    ss.pop("unmix_roi_error", None)
    if up is None or result is None:
        return
    name = safe_name(up.name or "rois.json")
    ss.pop("unmix_roi_info", None)
    try:
        roi_file = parse_roi_text(up.getvalue().decode("utf-8-sig", errors="replace"), source=name,
                                  image_size=_image_size(result))
        shapes, bg = roi_file.shapes, roi_file.background
        shapes_to_rois(shapes, result["abundances"].shape[-2:])
    except InputError as exc:
        ss["unmix_roi_error"] = f"ROI file: {exc}"
        return
    skipped = [r.name for r in roi_file.label_regions]
    if skipped:
        ss["unmix_roi_info"] = (f"{name}: the label regions {', '.join(skipped)} need their label image and are not "
                                "drawn here; the command line and the study use them.")
    ss["unmix_regions"] = shapes
    ss["w_roi_background"] = bg if bg in [s.name for s in shapes] else "(none)"
    ss.pop("unmix_roi_rows", None)


def _regions_section(result: dict) -> None:
    from probeplan.unmixing.roifile import roi_file_text
    from probeplan.unmixing.shapes import shape_from_selection, shapes_to_rois, suggest_target_roi

    ss = st.session_state
    st.subheader("Regions of interest")
    st.caption("Choose a map, then drag a box on it (a rectangle, or the ellipse inside the box) or pick the lasso "
               "in the chart's toolbar for a freehand polygon; name the region and add it. The regions are saved "
               "to an ROI file (JSON, pixels from the image's top-left corner) that loads back here, in the study "
               "view, and on the command line (probeplan unmix --roi FILE.json, probeplan study --rois FILE).")
    names = result["names"]
    ss.setdefault("w_roi_component", names[0])
    if ss["w_roi_component"] not in names:
        ss["w_roi_component"] = names[0]
    c = st.columns([2, 2, 2, 1])
    comp = c[0].selectbox("map to draw on", names, key="w_roi_component")
    kind = c[1].radio("a box makes", ["rectangle", "ellipse"], key="w_roi_kind", horizontal=True,
                      help="A lasso always makes a polygon.")
    name = c[2].text_input("region name", key="w_roi_name", placeholder="e.g. tumour, muscle, background")
    selection, factor = _draw_chart(result, names.index(comp))
    if c[3].button("Add region", key="btn_roi_add", type="primary"):
        with guard("region"):
            from probeplan.errors import input_error

            if not str(name).strip():
                raise input_error("region name", "is empty", "type a name, e.g. tumour")
            shape = shape_from_selection(selection or {}, str(name).strip(), shape=str(kind), scale=float(factor),
                                         image_size=_image_size(result), offset=0.0)
            shapes_to_rois([shape], result["abundances"].shape[-2:])  # refuses a region outside the image
            _add_region(shape)
            st.rerun()

    # automatic target region, shown for confirmation
    with guard("automatic target region"):
        auto = suggest_target_roi(result["abundances"][names.index(comp)], name=f"{comp} spot")
        if auto is not None and auto.name not in _region_names():
            x0, y0, x1, y1 = auto.box
            a = st.columns([4, 1])
            a[0].info(f"Automatic target region for {comp}: the bright spot above half its peak, x {x0:g}–{x1:g}, "
                      f"y {y0:g}–{y1:g} (pixels). Check it on the maps before you use it.")
            if a[1].button("Use it", key="btn_roi_auto"):
                _add_region(auto)
                st.rerun()

    regions = _regions()
    if regions:
        st.caption("Regions: " + "; ".join(f"{r.name} ({r.shape})" for r in regions))
        rows = [{"region": r.name, "shape": r.shape, "x from (pixel)": fmt(min(r.x)), "x to": fmt(max(r.x)),
                 "y from": fmt(min(r.y)), "y to": fmt(max(r.y)),
                 "pixels": int(r.mask(result["abundances"].shape[-2:]).sum())} for r in regions]
        st.dataframe(rows, hide_index=True, width="stretch")
    c = st.columns([2, 2, 2, 2])
    drop = c[0].multiselect("remove regions", _region_names(), key="w_roi_drop")
    if c[0].button("Remove", key="btn_roi_remove", disabled=not drop):
        ss["unmix_regions"] = [r for r in regions if r.name not in drop]
        ss.pop("unmix_roi_rows", None)
        st.rerun()
    background_choices = ["(none)", *_region_names()]
    default_bg = "background" if "background" in _region_names() else "(none)"
    if ss.get("w_roi_background") not in background_choices:
        ss["w_roi_background"] = default_bg
    c[1].selectbox("background region (for target-to-background ratios)", background_choices, key="w_roi_background")
    background = None if ss["w_roi_background"] == "(none)" else str(ss["w_roi_background"])
    c[2].download_button("Save the regions (ROI file)", roi_file_text(regions, image_size=_image_size(result),
                                                                        background=background),
                         file_name=f"{safe_name(Path(result['stack_name']).stem, 'stack')}_rois.json",
                         mime="application/json", key="dl_rois", disabled=not regions)
    c[3].file_uploader("load a ROI file", type=["json"], key="up_rois", on_change=_load_roi_file)
    if ss.get("unmix_roi_error"):
        st.error(ss["unmix_roi_error"])
    if ss.get("unmix_roi_info"):
        st.info(ss["unmix_roi_info"])
    if st.button("Measure the regions", key="btn_roi_measure", disabled=not regions):
        with guard("regions"):
            from probeplan.unmixing.roi import roi_statistics

            rois = shapes_to_rois(regions, result["abundances"].shape[-2:])
            ss["unmix_roi_rows"] = roi_statistics(result["abundances"], rois, names,
                                                  background=background).to_dict("records")
    rows = ss.get("unmix_roi_rows")
    if rows:
        from probeplan.io.atomic import table_to_csv_text
        from probeplan.unmixing.roi import ROI_COLUMNS

        bg_text = f"against '{background}'" if background else "(no background region chosen)"
        st.markdown(f"**Mean ± SD of the abundance in each region** (target-to-background ratio {bg_text})")
        shown = {"roi": "region", "component": "component", "n_pixels": "pixels", "n_nan": "pixels left out (NaN)",
                 "mean": f"mean abundance ({_UNIT})", "sd": f"SD ({_UNIT})", "tbr": "target-to-background ratio"}
        st.dataframe([{shown.get(k, k): (fmt(v) if isinstance(v, float) else v) for k, v in r.items()} for r in rows],
                     hide_index=True, width="stretch")
        stem = safe_name(Path(result["stack_name"]).stem, "stack")
        st.download_button("ROI statistics (CSV)", table_to_csv_text(rows, ROI_COLUMNS), file_name=f"{stem}_roi.csv",
                           mime="text/csv", key="dl_roi")


# --------------------------------------------------------------------------- maps


def _maps_section(result: dict) -> None:
    from probeplan.unmixing.overlay import upper_limits

    names = result["names"]
    regions = _regions()
    px = result.get("pixel_size_um")
    st.markdown("**Abundance maps**: one panel per component, each with its own colour scale"
                + ("" if px else "; the file gives no pixel size, so the axes are in pixels"))
    st.image(maps_png(result["abundances"], names, f"abundance ({_UNIT})", pixel_size_um=px, rois=tuple(regions)),
             caption="Colour scale from 0 to each map's 99.5th percentile; dashed outlines: the regions below.",
             width="stretch")
    tabs = st.tabs(["composite", "standard error", "residual"])
    with tabs[0]:
        auto = upper_limits(result["abundances"])
        limits = []
        cols = st.columns(min(4, len(names)))
        for k, n in enumerate(names):
            hi = max(auto[k], 1e-12)
            pct = cols[k % len(cols)].slider(f"{n}: full brightness at (% of its 99.5th percentile)",
                                             min_value=5, max_value=400, value=100, step=5, key=f"w_contrast_{k}")
            limits.append(hi * pct / 100.0)
        st.image(composite_png(result["abundances"], names, tuple(limits), pixel_size_um=px, rois=tuple(regions)),
                 caption="Each component in its own colour (Okabe–Ito colours, distinct for colour-blind readers); "
                         "where components overlap the brighter one shows.", width="content")
    with tabs[1]:
        st.image(maps_png(result["stderr"], [f"{n} standard error" for n in names], _UNIT, cmap="viridis",
                          pixel_size_um=px), width="stretch")
    with tabs[2]:
        st.image(maps_png(result["residual"][None], ["residual RMS over channels"], _UNIT, cmap="viridis",
                          pixel_size_um=px), width="content")


def _calibrate(result: dict, path: Path, depth_mm: float) -> dict:
    """Concentrations (µM) of the calibrated components (probeplan.study.calibration), with the calibration's figure."""
    from probeplan.report.document import figure_png_bytes
    from probeplan.study.calibration import apply_calibration, plot_calibration, read_calibration_csv

    cal = read_calibration_csv(path)
    with captured_warnings(result["notes"]):
        out = apply_calibration(result["abundances"], result["stderr"], result["names"], cal, depth_mm=depth_mm)
    out["table"] = cal.table
    out["figure"] = figure_png_bytes(plot_calibration(cal), dpi=FIGURE_DPI)
    return out


def _calibrated_section(result: dict) -> None:
    cal = result.get("calibrated")
    if not cal:
        return
    from probeplan.study.calibration import FLAGS

    st.markdown("**Concentration maps (µM)** from the phantom calibration")
    st.image(maps_png(cal["concentration_uM"], [f"{n}" for n in cal["names"]], "concentration (µM)",
                      pixel_size_um=result.get("pixel_size_um"), rois=tuple(_regions())), width="stretch")
    flags = cal["flags"]
    rows = []
    for k, n in enumerate(cal["names"]):
        total = flags[k].size
        share = {f"pixels {FLAGS[code].replace('_', ' ')}": f"{100 * float((flags[k] == code).sum()) / total:.1f} %"
                 for code in sorted(FLAGS)}
        rows.append({"component": n, **share})
    st.dataframe(rows, hide_index=True, width="stretch")
    with st.expander("The calibration lines"):
        st.image(cal["figure"], width="stretch")
        t = cal["table"]
        st.dataframe([{c: (fmt(v) if isinstance(v, float) else v) for c, v in r.items()} for r in t.to_dict("records")],
                     hide_index=True, width="stretch")


def _phantom_calibration_section() -> None:
    """Make calibration.csv from phantom images (:func:`probeplan.study.calibration.calibrate_phantom`), as
    ``probeplan calibrate`` does; the files are read where they are on this computer."""
    ss = st.session_state
    with st.expander("No calibration.csv yet? Make one from phantom images (PHANTOM.csv on this computer)"):
        st.caption("PHANTOM.csv has one row per well or tube: file, component, concentration_uM, roi (\"x0,y0,x1,y1\" "
                   "in pixels), blanks at 0 µM included; file paths are relative to it. Each file is unmixed, counts "
                   "are fitted against concentration per component (weighted, with intercept); LOD = 3 × SD of the "
                   "blank / slope (IUPAC).")
        c = st.columns([3, 3, 1, 1])
        c[0].text_input("phantom table (PHANTOM.csv)", key="w_cal_phantom", placeholder="/path/to/PHANTOM.csv")
        c[1].text_input("spectra of the phantom's probes (references CSV)", key="w_cal_refs",
                        placeholder="/path/to/references.csv")
        ss.setdefault("w_cal_depth", 0.0)
        c[2].number_input("well depth (mm)", min_value=0.0, max_value=50.0, step=0.5, key="w_cal_depth")
        ss.setdefault("w_cal_tissue", "phantom")
        c[3].text_input("medium", key="w_cal_tissue")
        if st.button("Fit the calibration", key="btn_cal_fit"):
            ss.pop("phantom_calibration", None)
            with guard("calibration"):
                from probeplan.errors import input_error
                from probeplan.report.document import figure_png_bytes
                from probeplan.study.calibration import calibrate_phantom, plot_calibration
                from probeplan.unmixing.references import read_references_csv

                phantom, refs = str(ss["w_cal_phantom"]).strip(), str(ss["w_cal_refs"]).strip()
                if not phantom or not refs:
                    raise input_error("calibration", "the phantom table and the reference spectra are both needed",
                                      "give the path of each file on this computer")
                notes: list[str] = []
                with captured_warnings(notes):
                    cal = calibrate_phantom(Path(phantom).expanduser(), read_references_csv(Path(refs).expanduser()),
                                            depth_mm=float(ss["w_cal_depth"]), tissue=str(ss["w_cal_tissue"]) or
                                            "phantom")
                ss["phantom_calibration"] = {"table": cal.table, "csv": cal.table.to_csv(index=False),
                                             "png": figure_png_bytes(plot_calibration(cal), dpi=FIGURE_DPI),
                                             "notes": [*cal.notes, *notes]}
        stored = ss.get("phantom_calibration")
        if stored:
            t = stored["table"]
            st.dataframe([{k: (fmt(v) if isinstance(v, float) else v) for k, v in r.items()}
                          for r in t.to_dict("records")], hide_index=True, width="stretch", key="df_cal_table")
            st.image(stored["png"], width="stretch")
            st.download_button("calibration.csv (upload it above for maps in µM)", stored["csv"],
                               file_name="calibration.csv", mime="text/csv", key="dl_calibration")
            for n in stored["notes"]:  # (no folded box: expanders do not nest)
                st.caption(f"note: {n}")


def _downloads(result: dict) -> None:
    tif, err = Path(result["outputs"]["abundance"]), Path(result["outputs"]["stderr"])
    c = st.columns(3)
    c[0].download_button("Abundance maps (OME-TIFF)", tif.read_bytes(), file_name=tif.name, mime="image/tiff",
                         key="dl_abundance")
    c[1].download_button("Standard errors (OME-TIFF)", err.read_bytes(), file_name=err.name, mime="image/tiff",
                         key="dl_stderr")


def unmix_view() -> None:
    """Upload, unmix, read the maps, draw and measure regions, download."""
    st.header("Unmix: image stacks to abundance maps")
    st.caption("A multichannel TIFF or OME-TIFF stack (channels first) and the reference spectra of each probe in "
               "each channel (CSV: a 'channel' column, then one column per probe or autofluorescence) give an "
               "abundance map per probe with its standard error, and the residual of the fit.")
    ss = st.session_state
    ss.setdefault("w_sep_demo", False)
    ss.setdefault("w_sep_method", "nnls")
    ss.setdefault("w_sep_gain", 1.0)
    ss.setdefault("w_sep_read_noise", 0.0)
    ss.setdefault("w_sep_offset", False)
    demo = None
    with guard("demo data"):
        demo = demo_inputs()
    st.checkbox("use the demo stack and references (invented study)", persist_state="session", key="w_sep_demo",
                disabled=demo is None,
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
    c[0].selectbox("method", ["nnls", "ls", "wls"], persist_state="session", key="w_sep_method",
                   format_func={"nnls": "non-negative least squares", "ls": "least squares",
                                "wls": "Poisson-weighted least squares"}.get)
    c[1].number_input("camera gain (e⁻/count)", min_value=1e-6, max_value=1e6, step=0.1, persist_state="session",
                      key="w_sep_gain")
    c[2].number_input("camera read noise (e⁻ rms)", min_value=0.0, max_value=1e4, step=0.5, persist_state="session",
                      key="w_sep_read_noise")
    c[3].checkbox("fit a constant offset per channel", persist_state="session", key="w_sep_offset")
    c = st.columns([2, 1])
    up_cal = c[0].file_uploader("calibration (calibration.csv from 'probeplan calibrate', optional: maps in µM)",
                                type=["csv"], key="up_calibration")
    ss.setdefault("w_sep_depth", 0.0)
    c[1].number_input("target depth (mm), for the calibration's depth check", min_value=0.0, max_value=50.0,
                      step=0.5, persist_state="session", key="w_sep_depth")
    _phantom_calibration_section()
    if st.button("Unmix", type="primary", key="btn_unmix"):
        ss.pop("unmix_result", None)
        ss.pop("unmix_roi_rows", None)
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
            result = _unmix(stack_path, refs_path, dark, str(ss["w_sep_method"]), float(ss["w_sep_gain"]),
                            float(ss["w_sep_read_noise"]), bool(ss["w_sep_offset"]))
            if up_cal is not None:
                result["calibrated"] = _calibrate(result, save_upload(up_cal.getvalue(), up_cal.name or
                                                                      "calibration.csv", sub="uploads"),
                                                  float(ss["w_sep_depth"]))
            ss["unmix_result"] = result
            ss["unmix_regions"] = _demo_shapes() if use_demo else []
            ss.pop("unmix_roi_error", None)
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
        _maps_section(result)
        _calibrated_section(result)
        _downloads(result)
    with guard("regions"):
        _regions_section(result)
    show_notes(result["notes"], title="Unmixing notes")
