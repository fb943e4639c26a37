"""One image: decide, make the warp, resample."""

from __future__ import annotations

from nipype.interfaces import utility as niu
from nipype.pipeline import engine as pe

__all__ = ["init_unwarp_wf"]

METHODS = (
    "Gradient-nonlinearity distortion was corrected with nl_unwarp {version}. For each image, "
    "the scanner's own correction was read from its BIDS sidecar (NonlinearGradientCorrection, "
    "ImageType) and a site configuration; images not corrected by the scanner were corrected "
    "fully, images corrected in-plane only had the through-plane residual corrected, and images "
    "corrected in 3D were left unchanged. The displacement field of the scanner's gradient coils "
    "was computed from a spherical-harmonic coil model, placed with the patient position and the "
    "table position, and the image was resampled once through it with B-spline interpolation of "
    "order {order}{jacobian}."
)
#: Added to METHODS when the field file is on a grid of its own.
METHODS_FIELD_SPACING = (
    " The displacement field was stored on a {spacing:g} mm grid extending {margin:g} mm beyond "
    "the image and the image was resampled through it (trilinear between its nodes)."
)


def init_unwarp_wf(*, resample: bool = True, jacobian: bool = True, order: int = 3,
                   field_spacing_mm: float | None = None, name: str = "unwarp_wf"):
    """Correct one image for gradient nonlinearity, as its sidecar and site policy say.

    Parameters
    ----------
    resample : bool
        Resample the image; False makes only the warp products (for images the
        scanner corrected in 3D, when the warp is asked for).
    jacobian : bool
        Multiply by the Jacobian determinant.
    order : int
        B-spline interpolation order.
    field_spacing_mm : float, optional
        Voxel size of the field file's grid (default: the image's voxels); the
        image is resampled through that file, so a coarser grid adds its
        trilinear deviation (in the summary) to the correction.
    name : str

    Inputs
    ------
    in_file
        Raw image.
    metadata
        Its sidecar metadata, BIDS inheritance applied.
    site_config
        Site configuration file (optional with ``coil_override``).
    coil_override
        Coil model used instead of the site configuration's (optional).
    isocenter_offset_mm
        Isocenter offset overriding TablePosition (optional).

    Outputs
    -------
    corrected
        Corrected image (only with ``resample``).
    field, jacobian, magnitude, summary
        Warp products (ITK field, Jacobian map, displacement magnitude, JSON).
    decision
        The decision record (action, reason, rule, site, warnings).
    """
    from nl_unwarp import __version__
    from nl_unwarp.compose import FIELD_MARGIN_MM
    from nl_unwarp.interfaces.bids import DecideCorrection
    from nl_unwarp.interfaces.warp import ApplyWarp, MakeWarp

    workflow = pe.Workflow(name=name)
    workflow.__desc__ = METHODS.format(version=__version__, order=order,
                                       jacobian=", scaling intensities by the Jacobian determinant"
                                       if jacobian else "")
    if field_spacing_mm is not None:
        workflow.__desc__ += METHODS_FIELD_SPACING.format(spacing=field_spacing_mm, margin=FIELD_MARGIN_MM)
    inputnode = pe.Node(niu.IdentityInterface(
        fields=["in_file", "metadata", "site_config", "coil_override", "isocenter_offset_mm"]),
        name="inputnode")
    outputnode = pe.Node(niu.IdentityInterface(
        fields=["corrected", "field", "jacobian", "magnitude", "summary", "decision"]), name="outputnode")
    decide = pe.Node(DecideCorrection(), name="decide")
    make_warp = pe.Node(MakeWarp(), name="make_warp")
    if field_spacing_mm is not None:
        make_warp.inputs.field_spacing_mm = field_spacing_mm
    workflow.connect([
        (inputnode, decide, [("in_file", "in_file"), ("metadata", "metadata"),
                             ("site_config", "site_config"), ("coil_override", "coil_override"),
                             ("isocenter_offset_mm", "isocenter_offset_mm")]),
        (inputnode, make_warp, [("in_file", "reference")]),
        (decide, make_warp, [("coil_model", "coil_model"), ("patient_position", "patient_position"),
                             ("table_position_mm", "table_position_mm"),
                             ("isocenter_offset_mm", "isocenter_offset_mm"), ("mode", "mode")]),
        (decide, outputnode, [("decision", "decision")]),
        (make_warp, outputnode, [("out_field", "field"), ("out_jacobian", "jacobian"),
                                 ("out_magnitude", "magnitude"), ("out_summary", "summary")]),
    ])
    if resample:
        apply = pe.Node(ApplyWarp(jacobian=jacobian, order=order), name="apply_warp")
        workflow.connect([
            (inputnode, apply, [("in_file", "in_file")]),
            (make_warp, apply, [("out_field", "field"), ("out_jacobian", "jacobian_map")]),
            (apply, outputnode, [("out_file", "corrected")]),
        ])
    return workflow
