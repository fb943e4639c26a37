"""Resample once: compose a correction with registration transforms and apply the chain in one step."""

from __future__ import annotations

from nipype.interfaces import utility as niu
from nipype.pipeline import engine as pe

__all__ = ["init_resample_once_wf", "init_series_resample_once_wf"]

METHODS = (
    "The gradient-nonlinearity correction was not applied as a separate resampling: its "
    "displacement field (computed by nl_unwarp {version} on the raw grid grown by {margin:g} mm) "
    "was composed with the registration transforms, and the raw image was resampled once "
    "through the chain with B-spline interpolation of order {order}, its intensities multiplied "
    "by the correction's Jacobian determinant at the corrected-space position of each voxel."
)


def _append(transforms, last):
    """Chain = registration transforms (application order) followed by the correction."""
    transforms = [transforms] if isinstance(transforms, str) else list(transforms)
    return transforms + [last]


def _compose_node(name: str, *, write_field: bool, write_composite: str, mapped: bool = False):
    from nl_unwarp.interfaces.compose import ComposeTransforms

    interface = ComposeTransforms(on_outside="warn", write_field=write_field,
                                  write_composite=write_composite)
    if mapped:
        return pe.MapNode(interface, iterfield=["transforms"], name=name)
    return pe.Node(interface, name=name)


def init_resample_once_wf(*, order: int = 3, write_field: bool = False, write_composite: str = "h5",
                          name: str = "resample_once_wf") -> pe.Workflow:
    """Resample the raw image once through registration transforms and the correction.

    Parameters
    ----------
    order : int
        B-spline interpolation order of the single resampling.
    write_field : bool
        Also write the composed displacement field (for other tools; the
        resampling itself follows the chain and stores no field).
    write_composite : {"h5", "x5", "none"}
        Also write the chain un-folded (ITK composite or X5).
    name : str

    Inputs
    ------
    in_file
        Raw (uncorrected) image.
    transforms
        Registration transforms from the target grid to the corrected image,
        in application order (antspyx ``fwdtransforms`` order, e.g. warp, affine).
    correction_field
        Our correction field, covering the raw field of view with a margin.
    jacobian_map
        Our correction's Jacobian determinant map; when given (the default
        in our pipelines), intensities are multiplied by it at each voxel's
        corrected-space position. Leave it unset for no factor.
    reference
        Image defining the target grid (e.g. the template).

    Outputs
    -------
    out_file
        The raw image resampled once onto the target grid.
    composed_field
        The composed ITK displacement field on the target grid (``write_field``).
    composed_factor
        The intensity factor on the target grid (``write_field`` with a Jacobian map).
    composite
        The chain un-folded (ITK composite .h5 or X5), if asked for.
    """
    from nl_unwarp.interfaces.compose import ResampleOnce

    wf = pe.Workflow(name=name)
    inputnode = pe.Node(niu.IdentityInterface(["in_file", "transforms", "correction_field",
                                               "jacobian_map", "reference"]), name="inputnode")
    outputnode = pe.Node(niu.IdentityInterface(["out_file", "composed_field", "composed_factor",
                                                "composite"]), name="outputnode")
    chain = pe.Node(niu.Function(function=_append, input_names=["transforms", "last"],
                                 output_names=["chain"]), name="chain")
    resample = pe.Node(ResampleOnce(order=order), name="resample")
    wf.connect([
        (inputnode, chain, [("transforms", "transforms"), ("correction_field", "last")]),
        (chain, resample, [("chain", "transforms")]),
        (inputnode, resample, [("in_file", "in_file"), ("reference", "reference"),
                               ("jacobian_map", "jacobian_map")]),
        (resample, outputnode, [("out_file", "out_file")]),
    ])
    if write_field or write_composite != "none":
        compose = _compose_node("compose", write_field=write_field, write_composite=write_composite)
        wf.connect([
            (chain, compose, [("chain", "transforms")]),
            (inputnode, compose, [("reference", "reference"), ("in_file", "raw")]),
            (compose, outputnode, [("out_composite", "composite")]),
        ])
        if write_field:
            wf.connect([
                (inputnode, compose, [("jacobian_map", "jacobian_map")]),
                (compose, outputnode, [("out_field", "composed_field"), ("out_factor", "composed_factor")]),
            ])
    return wf


def _per_volume_chains(motion, correction):
    """One chain per volume: its motion affine (reference -> volume), then the correction."""
    return [[m, correction] for m in motion]


def init_series_resample_once_wf(*, order: int = 3, write_fields: bool = False,
                                 name: str = "series_resample_once_wf") -> pe.Workflow:
    """Per-volume motion composed with the correction; each raw volume resampled once.

    The correction is fixed in the scanner frame, so one field serves every
    volume; the motion of volume ``t`` maps a point of the reference volume's
    (corrected) grid to volume ``t``'s corrected space. Chain of volume ``t``:
    ``[motion_t, correction]``, the Jacobian factor taken at ``motion_t(p)``.

    Parameters
    ----------
    order : int
        B-spline interpolation order.
    write_fields : bool
        Also write one composed field per volume (for other tools).
    name : str

    Inputs
    ------
    in_file
        Raw 4-D series.
    motion_transforms
        One ITK affine per volume (reference -> volume ``t``, pull).
    correction_field
        Our correction field, covering the raw field of view with a margin.
    jacobian_map
        Our correction's Jacobian determinant map (unset: no intensity factor).
    reference
        Image defining the output grid (e.g. the raw grid of the reference volume).

    Outputs
    -------
    out_file
        The series, motion-corrected and distortion-corrected in one resampling.
    composed_fields
        One composed field per volume (``write_fields``).
    """
    from nl_unwarp.interfaces.compose import ResampleOnce

    wf = pe.Workflow(name=name)
    inputnode = pe.Node(niu.IdentityInterface(["in_file", "motion_transforms", "correction_field",
                                               "jacobian_map", "reference"]), name="inputnode")
    outputnode = pe.Node(niu.IdentityInterface(["out_file", "composed_fields"]), name="outputnode")
    resample = pe.Node(ResampleOnce(order=order), name="resample")
    wf.connect([
        (inputnode, resample, [("in_file", "in_file"), ("motion_transforms", "volume_transforms"),
                               ("correction_field", "transforms"), ("reference", "reference"),
                               ("jacobian_map", "jacobian_map")]),
        (resample, outputnode, [("out_file", "out_file")]),
    ])
    if write_fields:
        chains = pe.Node(niu.Function(function=_per_volume_chains, input_names=["motion", "correction"],
                                      output_names=["chains"]), name="chains")
        compose = _compose_node("compose", write_field=True, write_composite="none", mapped=True)
        wf.connect([
            (inputnode, chains, [("motion_transforms", "motion"), ("correction_field", "correction")]),
            (chains, compose, [("chains", "transforms")]),
            (inputnode, compose, [("reference", "reference"), ("in_file", "raw")]),
            (compose, outputnode, [("out_field", "composed_fields")]),
        ])
    return wf
