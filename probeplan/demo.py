"""The demo study: the whole job on the invented scenario in ``demo_tissue/``.

``demo_tissue/`` holds an invented three-probe plan (``plan.toml``), an example
institution rules file (``rules.toml``), and files made by
:func:`generate_demo_files` from the project's own forward model with a fixed
seed: reference spectra (``references.csv``), single-probe and unlabelled
control stacks (``control_*.tif``, ``unlabelled.tif``), the dark frame
(``dark.tif``), the three-probe stack (``stack.tif``) and its ground truth
(``ground_truth.tif``, µM).  :func:`run_demo` runs plan → check → unmix → ROI
statistics → report into one folder and returns where the report is.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from probeplan.errors import AssumptionWarning, input_error
from probeplan.io.atomic import make_output_folder, output_batch, readable_path

__all__ = ["DemoResult", "run_demo", "generate_demo_files", "demo_folder", "demo_model", "DEFAULT_DEMO_OUT",
           "DEMO_FILES", "generate_demo_study", "demo_study_truth", "DEMO_STUDY_TIMES_H", "DEMO_STUDY_GROUPS",
           "DEMO_STUDY_HALF_LIFE_H"]

#: Default output folder of ``probeplan demo`` (relative to the working folder).
DEFAULT_DEMO_OUT = "probeplan-demo"
#: Files :func:`generate_demo_files` writes.
DEMO_FILES = ("references.csv", "stack.tif", "ground_truth.tif", "dark.tif", "unlabelled.tif", "control_1.tif",
              "control_2.tif", "control_3.tif")
#: Camera offset (counts) and conversion gain (e⁻ per count) of the simulated camera.
_OFFSET_COUNTS = 100.0
_GAIN_E_PER_COUNT = 1.0
#: Name of the background component in the demo references.
BACKGROUND_NAME = "autofluorescence"
#: The demo study (invented): time points (h), groups with their relative tumour uptake, animals per group.
DEMO_STUDY_TIMES_H = (1.0, 4.0, 8.0, 24.0, 48.0, 96.0)
DEMO_STUDY_GROUPS = {"control": 1.0, "blocked": 0.5}
DEMO_STUDY_ANIMALS = 3
#: Tumour washout half-life and uptake rate of the targeted probe in the demo study (Bateman time course).
DEMO_STUDY_HALF_LIFE_H = 24.0
DEMO_STUDY_UPTAKE_PER_H = 0.5


@dataclass
class DemoResult:
    """What the demo wrote: the output folder, the main report and every file; its headline figures."""

    out_dir: Path
    report: Path
    files: list[Path] = field(default_factory=list)
    rules_passed: bool = True
    summary: dict = field(default_factory=dict)


def demo_folder() -> Path:
    """The ``demo_tissue`` folder: inside the installed package, or beside it in a source checkout."""
    from probeplan.io.shipped import shipped_folder

    folder = shipped_folder("demo_tissue")
    if not (folder / "plan.toml").is_file():
        raise input_error("demo_tissue", f"no plan.toml in {folder}", "reinstall probeplan (pip install probeplan)")
    return folder


@dataclass
class DemoModel:
    """The demo's channel model: probes, channels, response and backgrounds at the target depth."""

    probes: list
    channels: list
    response_e_per_s: np.ndarray  # (C, K) per µM at the target depth
    background_e_per_s: np.ndarray  # (C,) autofluorescence + leakage
    exposure_s: np.ndarray  # (C,)
    camera: object
    target_uM: float
    uptake_ratio: float
    depth_mm: float


def demo_model(plan) -> DemoModel:
    """Probes, channels and responses of a plan at its target depth (the forward model of the demo stacks)."""
    from probeplan.model.channels import response_matrix
    from probeplan.model.fluorescence import background_rates
    from probeplan.study.evaluate import plan_model

    m = plan_model(plan)
    tgt = plan.target
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AssumptionWarning)
        resp = response_matrix(m.tissue, m.probes, m.channels, irradiance_mw_per_cm2=m.irradiance_mw_per_cm2,
                               depth_mm=[tgt["depth_mm"]], target_size_mm=tgt["size_mm"])[0]
        rates = [background_rates(m.tissue, m.probes, source=m.source, irradiance_mw_per_cm2=m.irradiance_mw_per_cm2,
                                  emission_filter=ch.emission_filter, camera=m.camera, lens=m.lens,
                                  background_concentration_uM=[0.0] * len(m.probes)) for ch in m.channels]
    bg = np.array([r["autofluorescence"] + r["leakage"] for r in rates])
    return DemoModel(m.probes, m.channels, resp, bg, np.array([ch.exposure_s for ch in m.channels]), m.camera,
                     tgt["concentration_uM"], tgt["uptake_ratio"], tgt["depth_mm"])


def generate_demo_files(folder: str | Path, plan=None) -> list[Path]:
    """Write the demo's reference spectra and stacks into ``folder`` (seeded: the same bytes every time)."""
    from probeplan.io.atomic import write_csv_atomic
    from probeplan.io.stacks import write_stack
    from probeplan.study.plan import load_plan
    from probeplan.unmixing.synthetic import DEMO_SEED, demo_scene, simulate_counts

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    plan = load_plan(demo_folder() / "plan.toml") if plan is None else plan
    model = demo_model(plan)
    names = [p.name for p in model.probes]
    channel_names = [ch.name for ch in model.channels]
    scene = demo_scene(names, target_uM=model.target_uM, uptake_ratio=model.uptake_ratio)
    cam = model.camera
    noise = dict(exposure_s=model.exposure_s, background_e_per_s=model.background_e_per_s,
                 dark_e_per_s=float(cam.dark_current_e_per_binned_px_s), read_noise_e=float(cam.read_noise_per_binned_px_e),
                 gain_e_per_count=_GAIN_E_PER_COUNT, offset_counts=_OFFSET_COUNTS)
    written = []
    counts_per_uM = model.response_e_per_s * model.exposure_s[:, None] / _GAIN_E_PER_COUNT
    background_counts = model.background_e_per_s * model.exposure_s / _GAIN_E_PER_COUNT
    rows = [{"channel": c, **{n: float(counts_per_uM[i, k]) for k, n in enumerate(names)},
             BACKGROUND_NAME: float(background_counts[i])} for i, c in enumerate(channel_names)]
    written.append(write_csv_atomic(folder / "references.csv", rows, ["channel", *names, BACKGROUND_NAME]))
    stack = simulate_counts(scene.abundance_uM, model.response_e_per_s, seed=DEMO_SEED, **noise)
    written.append(write_stack(folder / "stack.tif", stack, channel_names=channel_names, dtype=np.uint16))
    truth = np.concatenate([scene.abundance_uM, np.ones((1, *scene.abundance_uM.shape[1:]))])
    written.append(write_stack(folder / "ground_truth.tif", truth, channel_names=[*names, BACKGROUND_NAME]))
    dark = (_OFFSET_COUNTS + float(cam.dark_current_e_per_binned_px_s) * model.exposure_s / _GAIN_E_PER_COUNT)
    dark_frame = np.broadcast_to(dark[:, None, None], stack.shape).astype(np.float32)
    written.append(write_stack(folder / "dark.tif", dark_frame, channel_names=channel_names))
    zero = np.zeros_like(scene.abundance_uM)
    written.append(write_stack(folder / "unlabelled.tif", simulate_counts(zero, model.response_e_per_s,
                                                                          seed=DEMO_SEED + 1, **noise),
                               channel_names=channel_names, dtype=np.uint16))
    for k in range(len(names)):
        single = np.zeros_like(scene.abundance_uM)
        single[k] = scene.abundance_uM[k]
        path = folder / f"control_{k + 1}.tif"
        written.append(write_stack(path, simulate_counts(single, model.response_e_per_s, seed=DEMO_SEED + 2 + k,
                                                         **noise), channel_names=channel_names, dtype=np.uint16))
    return written


def _demo_study_amount(group: str, time_h: float) -> float:
    """Tumour concentration of the targeted probe relative to the plan's target, peak 1 in the control group."""
    from probeplan.study.kinetics import bateman

    ke = np.log(2.0) / DEMO_STUDY_HALF_LIFE_H
    gap = DEMO_STUDY_UPTAKE_PER_H - ke
    t_peak = np.log(DEMO_STUDY_UPTAKE_PER_H / ke) / gap
    return float(DEMO_STUDY_GROUPS[group] * bateman(time_h, 1.0, ke, gap) / bateman(t_peak, 1.0, ke, gap))


#: Animal-to-animal spread of the tumour uptake in the demo study (SD of a log-normal factor).
DEMO_STUDY_ANIMAL_SD = 0.15


def _demo_study_scene(plan, model, group, time_h, animal_factor):
    from probeplan.unmixing.synthetic import DEMO_SEED, demo_scene

    names = [p.name for p in model.probes]
    scene = demo_scene(names, target_uM=model.target_uM, uptake_ratio=model.uptake_ratio, seed=DEMO_SEED)
    tumour = scene.regions["tumour"]
    scene.abundance_uM[0][tumour] = model.target_uM * animal_factor * _demo_study_amount(group, time_h)
    return scene


def _demo_animals():
    """(animal, group, uptake factor) of every demo animal (seeded)."""
    from probeplan.unmixing.synthetic import DEMO_SEED

    rng = np.random.default_rng(DEMO_SEED + 7)
    return [(f"{g[0]}{i + 1}", g, float(np.exp(DEMO_STUDY_ANIMAL_SD * rng.standard_normal())))
            for g in DEMO_STUDY_GROUPS for i in range(DEMO_STUDY_ANIMALS)]


def generate_demo_study(folder: str | Path, plan=None) -> Path:
    """Write the demo study's stacks and its study table into ``folder``; return the table's path.

    Two invented groups (``control`` and ``blocked``, half the tumour uptake), three animals each,
    imaged at :data:`DEMO_STUDY_TIMES_H`; the targeted probe (the plan's first) follows a
    Bateman uptake–washout course in the tumour (half-life :data:`DEMO_STUDY_HALF_LIFE_H`), the
    other probes and the background stay as in the demo stack.  The first animal of each group
    is stored as one file per channel (as a filter-wheel camera writes it), the others as one
    multi-channel OME-TIFF.  Seeded: the same bytes every time.
    """
    import tifffile

    from probeplan.study.plan import load_plan
    from probeplan.unmixing.synthetic import DEMO_SEED, simulate_counts

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    plan = load_plan(demo_folder() / "plan.toml") if plan is None else plan
    model = demo_model(plan)
    cam = model.camera
    channel_names = [ch.name for ch in model.channels]
    noise = dict(exposure_s=model.exposure_s, background_e_per_s=model.background_e_per_s,
                 dark_e_per_s=float(cam.dark_current_e_per_binned_px_s), read_noise_e=float(cam.read_noise_per_binned_px_e),
                 gain_e_per_count=_GAIN_E_PER_COUNT, offset_counts=_OFFSET_COUNTS)
    rows = ["# The demo study (invented): two groups, three animals each, six time points.",
            "animal,group,time_h,file,channel"]
    for a_index, (animal, group, factor) in enumerate(_demo_animals()):
        for t_index, t in enumerate(DEMO_STUDY_TIMES_H):
            seed = DEMO_SEED + 1000 + 100 * a_index + t_index
            scene = _demo_study_scene(plan, model, group, t, factor)
            stack = simulate_counts(scene.abundance_uM, model.response_e_per_s, seed=seed, **noise)
            stem = f"{animal}.{t:g}h"
            if a_index % DEMO_STUDY_ANIMALS == 0:  # one file per channel
                for c, ch in enumerate(channel_names):
                    name = f"{stem}.channel{c + 1}.tif"
                    tifffile.imwrite(folder / name, stack[c])
                    rows.append(f"{animal},{group},{t:g},{name},{ch}")
            else:
                name = f"{stem}.ome.tif"
                tifffile.imwrite(folder / name, stack, ome=True, photometric="minisblack",
                                 metadata={"axes": "CYX", "Channel": {"Name": channel_names}})
                rows.append(f"{animal},{group},{t:g},{name},")
    # Plain writes, not the staged output helpers: these are the study's inputs, read back at once.
    (folder / "study.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    return folder / "study.csv"


def demo_study_truth(plan=None):
    """The demo study's true TBR and mean (µM) per animal, time point, ROI and component (a DataFrame)."""
    import pandas as pd

    from probeplan.study.plan import load_plan
    from probeplan.unmixing.roi import parse_rectangle

    plan = load_plan(demo_folder() / "plan.toml") if plan is None else plan
    model = demo_model(plan)
    rois = [parse_rectangle(r) for r in plan.analysis["rois"]]
    rows = []
    for animal, group, factor in _demo_animals():
        for t in DEMO_STUDY_TIMES_H:
            scene = _demo_study_scene(plan, model, group, t, factor)
            means = {}
            for roi in rois:
                x0, y0, x1, y1 = roi.rect
                means[roi.name] = scene.abundance_uM[:, y0:y1, x0:x1].reshape(len(model.probes), -1).mean(axis=1)
            for roi in rois:
                for k, p in enumerate(model.probes):
                    rows.append({"animal": animal, "group": group, "time_h": t, "roi": roi.name, "component": p.name,
                                 "mean": float(means[roi.name][k]),
                                 "tbr": float(means[roi.name][k] / means["background"][k])})
    return pd.DataFrame(rows)


def run_demo(out_dir: str | Path = DEFAULT_DEMO_OUT) -> DemoResult:
    """Run the demo study end to end into ``out_dir`` (created if needed).

    Steps: load the plan and check it against the example rules; unmix the
    demo stack with its reference spectra (exact NNLS with standard errors,
    dark frame subtracted); ROI statistics; compare the abundances with the
    ground truth (the fraction of pixels inside ±2 standard errors); write the
    report (``report/report.html``) with every table and figure.
    """
    with output_batch():  # the whole demo folder appears at the end, or nothing new does
        return _run_demo(Path(out_dir))


def _run_demo(out_dir: Path) -> DemoResult:
    from probeplan.io.stacks import read_stack
    from probeplan.report.document import plan_report, write_report
    from probeplan.study.evaluate import evaluate_plan
    from probeplan.study.plan import load_plan
    from probeplan.study.rules import load_rules
    from probeplan.unmixing.pipeline import unmix_file
    from probeplan.unmixing.references import read_references_csv

    folder = demo_folder()
    missing = [f for f in DEMO_FILES if not (folder / f).is_file()]
    if missing:
        raise input_error(str(folder), f"demo files missing: {', '.join(missing)}",
                          "regenerate them with probeplan.demo.generate_demo_files(probeplan.demo.demo_folder())")
    out = _prepare(Path(out_dir))
    plan = load_plan(folder / "plan.toml")
    rules = load_rules(folder / "rules.toml")
    evaluation = evaluate_plan(plan, rules)
    model = demo_model(plan)
    refs = read_references_csv(plan.resolve(plan.analysis["references"]), normalise=None)
    unmix_dir = make_output_folder(out / "unmix")
    result = unmix_file(
        plan.resolve(plan.analysis["stack"]), refs, unmix_dir / "abundance.ome.tif", method=plan.analysis["method"],
        dark_path=folder / "dark.tif", gain_e_per_count=_GAIN_E_PER_COUNT,
        read_noise_e=float(model.camera.read_noise_per_binned_px_e), rois=list(plan.analysis["rois"]),
        extra_inputs=[folder / "references.csv"],
        abundance_unit=["µM" if n != BACKGROUND_NAME else "relative (1 = demo background)"
                        for n in refs.component_names],
    )
    abundance, _ = read_stack(readable_path(result.outputs["abundance"]))
    stderr, _ = read_stack(readable_path(result.outputs["stderr"]))
    truth, _ = read_stack(folder / "ground_truth.tif")
    recovery = ground_truth_recovery(abundance, stderr, truth, list(refs.component_names))

    report = plan_report(evaluation)
    report.summary.append(
        "Unmixing of the demo stack (" + plan.analysis["method"] + "): "
        + "; ".join(f"{r['component']} {100 * r['within_2_sigma']:.1f} % of pixels within ±2σ of the truth"
                    for r in recovery)
    )
    report.add_table("unmix_qc", "Unmixing quality", [_flat_qc(result.qc)], note=(
        "Condition number of the references, fraction of pixels where a non-negativity constraint is active, "
        "residual statistics (counts), saturated and NaN pixels."))
    if result.roi_rows:
        report.add_table("roi_statistics", "Regions of interest (abundance in µM; TBR against 'background')",
                         result.roi_rows)
    closure_rows = _closure(plan, refs, result.roi_rows, report)
    report.add_table("ground_truth", "Recovery of the known ground truth (synthetic demo stack)", recovery, note=(
        "The demo stack was generated by probeplan's own forward model with a fixed seed; about 95 % of pixels "
        "should lie within ±2 predicted standard errors."))
    report.extra_files["overlay.png"] = readable_path(result.outputs["overlay"]).read_bytes()
    report.figures.append((
        "Unmixed abundances of the demo stack: left, every component in its own colour (Okabe–Ito colours, "
        "distinct for colour-blind readers; each at its own 99.5th percentile); right, one map per component with "
        "its colour bar. Dashed outlines: the regions of interest.", report.extra_files["overlay.png"]))
    report.assumptions.append(
        "Demo data: invented scenario; stacks simulated from the channel model at the target depth with Poisson and "
        "read noise, no lateral blur (probeplan.unmixing.synthetic).")
    study, study_files, tbr_check = _run_demo_study(out, plan, model, report)
    files = write_report(report, out / "report")
    written = [*result.outputs.values(), *files.values(), *study_files]
    return DemoResult(out, files["html"], [Path(p) for p in written], rules_passed=evaluation.passed,
                      summary={"rules_passed": evaluation.passed, "recovery": recovery, "qc": result.qc,
                               "study": {"acquisitions": len(study.acquisitions), "report": str(study_files[-1]),
                                         "tbr_check": tbr_check},
                               "closure": closure_rows})


def _run_demo_study(out: Path, plan, model, report):
    """Generate and analyse the demo study; add its headline figures and tables to the demo report."""
    from probeplan.report.study import study_report, write_study_report
    from probeplan.study.runs import StudySettings, run_study

    folder = demo_folder()
    table = generate_demo_study(out / "study_data", plan)
    settings = StudySettings(method=plan.analysis["method"], rois=tuple(plan.analysis["rois"]),
                             dark_path=folder / "dark.tif", gain_e_per_count=_GAIN_E_PER_COUNT,
                             read_noise_e=float(model.camera.read_noise_per_binned_px_e))
    study = run_study(table, folder / "references.csv", out_dir=out / "study", settings=settings, unit="µM")
    study_rep = study_report(study, settings)
    html = write_study_report(study_rep, out / "study")
    truth = demo_study_truth(plan)
    m = study.measurements
    target = m[(m["roi"] == "tumour") & (m["component"] == model.probes[0].name)]
    both = target.merge(truth[(truth["roi"] == "tumour") & (truth["component"] == model.probes[0].name)]
                        [["animal", "time_h", "tbr"]].rename(columns={"tbr": "tbr_true"}), on=["animal", "time_h"])
    check = both.groupby(["group", "time_h"], as_index=False).agg(
        animals=("animal", "nunique"), tbr_measured=("tbr", "mean"), tbr_true=("tbr_true", "mean"))
    check["ratio"] = check["tbr_measured"] / check["tbr_true"]
    rows = [{k: (v.item() if hasattr(v, "item") else v) for k, v in r.items()} for r in check.to_dict("records")]
    report.summary.append(
        f"Demo study: {len(study.acquisitions)} acquisitions ({m['animal'].nunique()} animals in two groups, "
        f"{m['time_h'].nunique()} time points; some stored one file per channel) unmixed; tumour TBR of "
        f"{model.probes[0].name} within {100 * float((check['ratio'] - 1).abs().max()):.0f} % of the known truth; "
        "full study report in study/report.html.")
    report.add_table("study_tbr_check", "Demo study: tumour TBR of the targeted probe, group mean against the truth",
                     rows, note="The demo study's stacks were generated with known concentrations; tbr_true is the "
                     "ratio of the true ROI means.")
    g = study.groups
    sel = g[(g["roi"] == "tumour") & (g["component"] == model.probes[0].name) & (g["quantity"] == "tbr")]
    report.add_table("study_groups", "Demo study: group comparison of the tumour TBR", [
        {k: (v.item() if hasattr(v, "item") else v) for k, v in r.items()} for r in sel.to_dict("records")],
        note="Welch's t-test with the Welch-Satterthwaite CI, Mann-Whitney U, Holm adjustment over the whole table "
             "(study/groups.csv).")
    report.figures.extend((f"Demo study: {caption}", png) for caption, png in study_rep.figures[:2])
    files = [*study.outputs.values(), html]
    return study, files, rows


def _closure(plan, refs, roi_rows, report) -> list[dict]:
    """Predicted beside measured for the demo's own ROIs (:func:`probeplan.study.closure.closure`), into the report."""
    from probeplan.study.closure import closure, measurements_from_roi_rows

    if not roi_rows:
        return []
    c = closure(measurements_from_roi_rows(roi_rows, animal="demo"), plan, refs)
    rows = c.table.to_dict("records")
    sbr = c.table[(c.table["quantity"] == "sbr")].iloc[0]
    tbr = c.table[(c.table["quantity"] == "tbr")].iloc[0]
    report.summary.append(
        f"Predicted beside measured ({sbr['component']}): the plan's SBR {sbr['predicted']:.2f} at "
        f"{plan.target['depth_mm']:g} mm is the raw-channel ratio (S + B)/B before unmixing; the TBR "
        f"{tbr['measured']:.2f} measured in the images is the ratio of unmixed abundances (tumour / background), "
        f"predicted as the plan's uptake ratio {tbr['predicted']:g}. Both hold; they measure different things.")
    report.add_table("closure", "Predicted beside measured: each quantity with what it means", rows, note=(
        "ratio = measured / predicted. Signal, background and noise in electrons of each probe's own channel "
        "(abundance x reference). " + " ".join(c.notes)))
    report.add_table("closure_fits", "Model unknowns fitted from the images (for the next plan)",
                     c.fits.to_dict("records"))
    return rows


def ground_truth_recovery(abundance, standard_error, truth, names) -> list[dict]:
    """Per component: fraction of pixels whose abundance lies within ±2 standard errors of the truth.

    Pixels with NaN (saturated or missing) are left out.
    """
    rows = []
    for k, name in enumerate(names):
        a, se, t = (np.asarray(x[k], dtype=np.float64) for x in (abundance, standard_error, truth))
        ok = np.isfinite(a) & np.isfinite(se) & (se > 0)
        z = np.abs(a[ok] - t[ok]) / se[ok]
        rows.append({"component": name, "pixels": int(ok.sum()), "within_2_sigma": float(np.mean(z <= 2.0)),
                     "within_1_sigma": float(np.mean(z <= 1.0)),
                     "mean_abs_error": float(np.mean(np.abs(a[ok] - t[ok]))),
                     "mean_standard_error": float(np.mean(se[ok])), "mean_truth": float(np.mean(t[ok]))})
    return rows


def _flat_qc(qc: dict) -> dict:
    """The headline QC figures as one table row."""
    resid = qc.get("residual_rms") or {}
    return {"method": qc.get("method"), "channels": qc.get("n_channels"), "components": len(qc.get("components", [])),
            "condition_number": qc.get("condition_number"), "pixels": qc.get("n_pixels"),
            "fraction_constrained": qc.get("fraction_constrained"), "saturated": qc.get("n_saturated"),
            "invalid": qc.get("n_invalid"), "residual_rms_mean_counts": float(resid.get("mean", float("nan")))}


def _prepare(out_dir: Path) -> Path:
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise input_error("out", f"{str(out_dir)!r} is a file", "give a folder path")
    return make_output_folder(out_dir)
