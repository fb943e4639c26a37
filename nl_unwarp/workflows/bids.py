"""A BIDS dataset: one :func:`~nl_unwarp.workflows.unwarp.init_unwarp_wf` per planned image, and a sink."""

from __future__ import annotations

import re
from pathlib import Path

from nipype.pipeline import engine as pe

__all__ = ["image_workflow_name", "init_bids_unwarp_wf"]


def image_workflow_name(relpath: str) -> str:
    """A nipype-safe node name for an image (``sub-01/anat/sub-01_T1w.nii.gz`` -> ``sub_01_T1w``)."""
    stem = Path(relpath).name.split(".")[0]
    return re.sub(r"[^A-Za-z0-9]", "_", stem)


def init_bids_unwarp_wf(*, plan, output_dir: str | Path, site_config: str | Path | None = None,
                        coil_override: str | Path | None = None, jacobian: bool = True,
                        order: int = 3, emit_warp_for_skipped: bool = False,
                        field_spacing_mm: float | None = None, reports: bool = True,
                        name: str = "bids_unwarp_wf"):
    """Correct every planned image of a dataset and write the derivatives.

    Parameters
    ----------
    plan : nl_unwarp.bids.plan.Plan
        Decisions made beforehand (``make_plan``); images with a problem must
        have been dealt with (``plan.raise_problems()``).
    output_dir : path
        Root of the derivatives dataset.
    site_config, coil_override : path, optional
        As given to the plan.
    jacobian, order
        Resampling options.
    emit_warp_for_skipped : bool
        For images the scanner corrected in 3D, still write the field and
        Jacobian map (no corrected image).
    field_spacing_mm : float, optional
        Voxel size of the field files' grids (default: each image's voxels).
    reports : bool
        Write each image's HTML quality report into ``<output_dir>/reports/``.
    name : str

    Returns
    -------
    nipype Workflow
        No inputnode/outputnode: every input is fixed by the plan, every
        output goes to the derivatives dataset.
    """
    from nl_unwarp.interfaces.bids import WriteDerivatives

    from .diffusion import add_bids_diffusion
    from .unwarp import init_unwarp_wf

    workflow = pe.Workflow(name=name)
    parameters = {"interpolation_order": order, "jacobian": jacobian}
    if field_spacing_mm is not None:
        parameters["field_spacing_mm"] = field_spacing_mm
    for row in plan.rows:
        if row.problem:
            raise ValueError(f"{row.relpath}: {row.problem} (call plan.raise_problems() first)")
        skipped = row.decision.action == "skip"
        dwi_options = {"site_config": site_config, "coil_override": coil_override}
        if skipped and not emit_warp_for_skipped:
            # A DWI's b-values are biased even when the scanner corrected its geometry.
            add_bids_diffusion(workflow, row, image_workflow_name(row.relpath), output_dir, **dwi_options)
            continue
        label = image_workflow_name(row.relpath)
        image_wf = init_unwarp_wf(resample=not skipped, jacobian=jacobian, order=order,
                                  field_spacing_mm=field_spacing_mm, name=f"{label}_wf")
        inputs = image_wf.get_node("inputnode").inputs
        inputs.in_file = row.path
        inputs.metadata = row.metadata
        # Absolute paths: nodes run in their own folders (and maybe on other hosts).
        if site_config is not None:
            inputs.site_config = str(Path(site_config).resolve())
        if coil_override is not None:
            inputs.coil_override = str(Path(coil_override).resolve())
        if row.decision.isocenter_offset_mm is not None:
            inputs.isocenter_offset_mm = list(row.decision.isocenter_offset_mm)
        sink = pe.Node(WriteDerivatives(out_dir=str(output_dir), source_relpath=row.relpath,
                                        metadata=row.metadata, parameters=parameters,
                                        companions=row.companions), name=f"{label}_sink",
                       run_without_submitting=True)
        fields = ["field", "jacobian", "magnitude", "summary", "decision"]
        if not skipped:
            fields.append("corrected")
        workflow.connect([(image_wf, sink, [(f"outputnode.{f}", f) for f in fields])])
        dwi = add_bids_diffusion(workflow, row, label, output_dir, sink=sink, **dwi_options)
        if reports:
            _connect_report(workflow, image_wf, row, label, output_dir, skipped, dwi)
    return workflow


def _connect_report(workflow, image_wf, row, label: str, output_dir, skipped: bool,
                    dwi: bool = False) -> None:
    """One image's quality report, put into ``<output_dir>/reports/``.

    The report gets the magnitude map and the coil file (so it need not
    inflate the field) and, for a DWI, the weighting summary (its b-value
    deviation per shell).
    """
    from nl_unwarp.interfaces.report import ImageReport, SinkReport
    from nl_unwarp.report.files import REPORTS_DIR, image_report_name

    report = pe.Node(ImageReport(in_file=row.path, metadata=row.metadata, title=row.relpath),
                     name=f"{label}_report")
    if Path(row.decision.coil_path).is_file():
        # Used only if it is the coil the summary names (same SHA-256).
        report.inputs.coil_file = str(Path(row.decision.coil_path).resolve())
    put = pe.Node(SinkReport(out_path=str(Path(output_dir) / REPORTS_DIR / image_report_name(row.relpath))),
                  name=f"{label}_report_put", run_without_submitting=True)
    fields = ["summary", "field", "jacobian", "magnitude", "decision"] + ([] if skipped else ["corrected"])
    workflow.connect([(image_wf, report, [(f"outputnode.{f}", f) for f in fields]),
                      (report, put, [("out_report", "in_report")])])
    if dwi:
        branch = workflow.get_node(f"{label}_dwi_wf")
        workflow.connect(branch, "outputnode.summary", report, "diffusion_summary")
