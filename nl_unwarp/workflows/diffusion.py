"""One DWI series: the gradient coil tensor and its effective diffusion weighting."""

from __future__ import annotations

from pathlib import Path

from nipype.interfaces import utility as niu
from nipype.pipeline import engine as pe

__all__ = ["add_bids_diffusion", "init_diffusion_weighting_wf"]

METHODS = (
    "The diffusion weighting actually applied by the nonlinear gradient coils was computed with "
    "nl_unwarp {version} (Bammer et al., 2003): the per-voxel coil tensor L, the spatial derivative "
    "of the gradient coils' fields per unit nominal gradient, was evaluated from the same "
    "spherical-harmonic coil model on the corrected grid and expressed in the frame of the "
    "b-vectors; each volume's effective b-value is b|Lg|^2 and its direction Lg/|Lg|. The "
    "b-vectors were not rotated by the geometric correction."
)


def init_diffusion_weighting_wf(*, voxel_tables: bool = False, name: str = "diffusion_weighting_wf"):
    """Decide the coil and frame of a DWI from its sidecar, then compute its coil tensor and b-tables.

    Parameters
    ----------
    voxel_tables : bool
        Also write per-voxel b-values and b-vectors (large files).
    name : str

    Inputs
    ------
    in_file, bval, bvec
        The DWI series and its b-table.
    metadata
        Its sidecar metadata, BIDS inheritance applied.
    site_config, coil_override, isocenter_offset_mm
        As :func:`~nl_unwarp.workflows.unwarp.init_unwarp_wf`.
    mask
        Brain mask on the DWI grid (optional).

    Outputs
    -------
    tensor, tensor_sidecar
        Coil tensor (X, Y, Z, 1, 9) and its sidecar (frame, order, units).
    deviation, summary
        b-value deviation map per shell and the summary JSON.
    mean_bval, mean_bvec
        Mask-averaged effective b-table.
    voxel_bvals, voxel_bvecs
        Per-voxel tables (with ``voxel_tables``).
    decision
        The decision record.
    """
    from nl_unwarp import __version__
    from nl_unwarp.interfaces.bids import DecideCorrection
    from nl_unwarp.interfaces.diffusion import DiffusionWeighting

    workflow = pe.Workflow(name=name)
    workflow.__desc__ = METHODS.format(version=__version__)
    inputnode = pe.Node(niu.IdentityInterface(
        fields=["in_file", "bval", "bvec", "metadata", "site_config", "coil_override",
                "isocenter_offset_mm", "mask"]), name="inputnode")
    products = ["tensor", "tensor_sidecar", "deviation", "summary", "mean_bval", "mean_bvec",
                "voxel_bvals", "voxel_bvecs"]
    outputnode = pe.Node(niu.IdentityInterface(fields=products + ["decision"]), name="outputnode")
    decide = pe.Node(DecideCorrection(), name="decide")
    weighting = pe.Node(DiffusionWeighting(voxel_tables=voxel_tables), name="weighting")
    workflow.connect([
        (inputnode, decide, [("in_file", "in_file"), ("metadata", "metadata"),
                             ("site_config", "site_config"), ("coil_override", "coil_override"),
                             ("isocenter_offset_mm", "isocenter_offset_mm")]),
        (inputnode, weighting, [("in_file", "in_file"), ("bval", "in_bval"), ("bvec", "in_bvec"),
                                ("mask", "mask")]),
        (decide, weighting, [("coil_model", "coil_model"), ("patient_position", "patient_position"),
                             ("table_position_mm", "table_position_mm"),
                             ("isocenter_offset_mm", "isocenter_offset_mm")]),
        (decide, outputnode, [("decision", "decision")]),
        (weighting, outputnode, [(f"out_{p}", p) for p in products]),
    ])
    return workflow


def _table_files(companions: dict) -> tuple[str | None, str | None]:
    """The source bval and bvec among a plan row's companions."""
    by_ext = {Path(dest).suffix: src for dest, src in companions.items()}
    return by_ext.get(".bval"), by_ext.get(".bvec")


def add_bids_diffusion(workflow, row, label: str, output_dir, *, sink=None, site_config=None,
                       coil_override=None) -> bool:
    """Add a DWI's weighting branch to a BIDS workflow, written with the image's derivatives.

    Runs for every planned DWI with a bval and a bvec, whatever the geometric
    decision: a scanner that corrected the geometry has not corrected the
    b-values (they depend on where each voxel sits in the coils' field).

    Parameters
    ----------
    workflow : nipype Workflow
    row : nl_unwarp.bids.plan.PlanRow
    label : str
        Node-name prefix of the image.
    output_dir : path
        Root of the derivatives dataset.
    sink : nipype Node, optional
        The image's :class:`~nl_unwarp.interfaces.bids.WriteDerivatives`: the
        weighting products join its ``companions`` (one set, all or none).
        Without it (a DWI whose geometry is left as the scanner made it) a
        sink of their own writes them.
    site_config, coil_override : path, optional

    Returns
    -------
    bool
        Whether a branch was added.
    """
    from nl_unwarp.interfaces.diffusion import DiffusionDerivativeFiles, WriteDiffusionDerivatives

    bval, bvec = _table_files(row.companions)
    if row.entities.get("suffix") != "dwi" or not (bval and bvec):
        return False
    branch = init_diffusion_weighting_wf(name=f"{label}_dwi_wf")
    inputs = branch.get_node("inputnode").inputs
    inputs.in_file, inputs.bval, inputs.bvec, inputs.metadata = row.path, bval, bvec, row.metadata
    if site_config is not None:
        inputs.site_config = str(Path(site_config).resolve())
    if coil_override is not None:
        inputs.coil_override = str(Path(coil_override).resolve())
    if row.decision.isocenter_offset_mm is not None:
        inputs.isocenter_offset_mm = list(row.decision.isocenter_offset_mm)
    files = pe.Node(DiffusionDerivativeFiles(source_relpath=row.relpath, metadata=row.metadata,
                                             companions=dict(row.companions)), name=f"{label}_dwi_files")
    fields = ["tensor", "tensor_sidecar", "deviation", "summary", "decision"]
    workflow.connect([(branch, files, [(f"outputnode.{f}", f) for f in fields])])
    if sink is None:
        sink = pe.Node(WriteDiffusionDerivatives(out_dir=str(output_dir), source_relpath=row.relpath,
                                                 metadata=row.metadata), name=f"{label}_dwi_sink",
                       run_without_submitting=True)
    workflow.connect([(files, sink, [("companions", "companions")])])
    return True
