"""Interfaces that make and apply the gradient-nonlinearity warp."""

from __future__ import annotations

import os

from nipype.interfaces.base import (
    BaseInterfaceInputSpec,
    File,
    SimpleInterface,
    TraitedSpec,
    isdefined,
    traits,
)

from ..compose import FIELD_MARGIN_MM
from ..frames import PATIENT_POSITIONS
from ..resample import ORDERS
from ..warp import MODES
from ._utils import optional

__all__ = ["ApplyWarp", "MakeWarp"]


class _MakeWarpInputSpec(BaseInterfaceInputSpec):
    reference = File(exists=True, mandatory=True, desc="image whose grid the warp is computed on")
    coil_model = File(exists=True, mandatory=True,
                      desc="coil model file (nl_unwarp-coil JSON); provenance keeps its SHA-256 only")
    patient_position = traits.Enum(*PATIENT_POSITIONS, usedefault=True,
                                   desc="DICOM PatientPosition of the patient in the scanner")
    table_position_mm = traits.List(traits.Float, minlen=3, maxlen=3,
                                    desc="BIDS TablePosition (mm); absent: the world origin is the "
                                         "isocenter (with a warning)")
    isocenter_offset_mm = traits.List(traits.Float, minlen=3, maxlen=3,
                                      desc="device coordinates (mm) of the world origin; overrides "
                                           "table_position_mm")
    mode = traits.Enum(*MODES, usedefault=True,
                       desc="correct all of the displacement, only in the slice plane, or only normal to it")
    slice_axis = traits.Enum("auto", "i", "j", "k", usedefault=True,
                             desc="voxel axis normal to the slices (auto: the axis of largest spacing)")
    field_margin_mm = traits.Range(low=0.0, value=FIELD_MARGIN_MM, usedefault=True,
                                   desc="the field's grid extends this far (mm) beyond the reference on "
                                        "every side, so that registration and ITK-style tools (identity "
                                        "outside a field) never leave it; 0: the reference grid. The "
                                        "other maps stay on the reference grid")
    field_spacing_mm = traits.Range(low=0.0, exclude_low=True,
                                    desc="voxel size (mm) of the field's grid, on the reference's axes "
                                         "(default: the reference's voxels); a coarser field is smaller, "
                                         "read trilinearly (the summary gives the largest deviation "
                                         "of that reading from the warp on the reference grid)")


class _MakeWarpOutputSpec(TraitedSpec):
    out_field = File(exists=True, desc="ITK/ANTs displacement field (NIfTI, LPS mm, intent vector), on "
                                       "the reference grid grown by field_margin_mm")
    out_jacobian = File(exists=True, desc="Jacobian determinant map")
    out_magnitude = File(exists=True, desc="displacement magnitude map, mm")
    out_summary = File(exists=True, desc="summary JSON (coil model SHA-256, isocenter, statistics)")


class MakeWarp(SimpleInterface):
    """Compute the warp of a gradient system on a reference image's grid.

    Calls :func:`nl_unwarp.api.warp_file`; writes ``field.nii.gz``,
    ``jacobian.nii.gz``, ``magnitude.nii.gz`` and ``summary.json`` in the node's
    folder.

    Examples
    --------
    >>> warp = MakeWarp()
    >>> warp.inputs.reference = "sub-01_T1w.nii.gz"  # doctest: +SKIP
    >>> warp.inputs.coil_model = "meridian45.json"  # doctest: +SKIP
    >>> warp.inputs.table_position_mm = [0.0, 0.0, -20.0]  # doctest: +SKIP
    >>> warp.inputs.mode = "throughplane"  # doctest: +SKIP
    >>> result = warp.run()  # doctest: +SKIP
    >>> result.outputs.out_field  # doctest: +SKIP
    '.../field.nii.gz'
    """

    input_spec = _MakeWarpInputSpec
    output_spec = _MakeWarpOutputSpec

    def _run_interface(self, runtime):
        from ..api import FrameSpec, WarpOutputs, warp_file

        names = {"field": "field.nii.gz", "jacobian": "jacobian.nii.gz",
                 "magnitude": "magnitude.nii.gz", "summary": "summary.json"}
        paths = {k: os.path.join(runtime.cwd, v) for k, v in names.items()}
        frame = FrameSpec(
            self.inputs.patient_position,
            tuple(self.inputs.table_position_mm) if isdefined(self.inputs.table_position_mm) else None,
            tuple(self.inputs.isocenter_offset_mm) if isdefined(self.inputs.isocenter_offset_mm) else None,
        )
        axis = None if self.inputs.slice_axis == "auto" else "ijk".index(self.inputs.slice_axis)
        spacing = optional(self.inputs, "field_spacing_mm")
        warp_file(self.inputs.reference, self.inputs.coil_model,
                  WarpOutputs(**paths, field_margin_mm=self.inputs.field_margin_mm, field_spacing_mm=spacing),
                  frame=frame, mode=self.inputs.mode, slice_axis=axis)
        self._results.update({f"out_{k}": v for k, v in paths.items()})
        return runtime


class _ApplyWarpInputSpec(BaseInterfaceInputSpec):
    in_file = File(exists=True, mandatory=True, desc="raw (distorted) image, 3-D or 4-D")
    field = File(exists=True, mandatory=True,
                 desc="ITK displacement field (from MakeWarp); it must cover the output grid")
    reference = File(exists=True, desc="image whose grid the output is on (default: in_file's own grid)")
    jacobian = traits.Bool(True, usedefault=True,
                           desc="multiply by the Jacobian determinant (intensity preservation)")
    jacobian_map = File(exists=True, desc="Jacobian determinant map (from MakeWarp), sampled at the "
                                          "output points; needed when jacobian is on")
    order = traits.Enum(3, *[o for o in ORDERS if o != 3], usedefault=True,
                        desc="B-spline interpolation order (3: cubic)")
    fill = traits.Float(0.0, usedefault=True, desc="value outside the raw field of view")


class _ApplyWarpOutputSpec(TraitedSpec):
    out_file = File(exists=True, desc="corrected image (float32)")


class ApplyWarp(SimpleInterface):
    """Resample an image through a displacement field: :math:`I_c(p) = I(p + d(p))\\,\\det J(p)`.

    The output is on ``reference``'s grid (the input's own grid by default),
    not on the field's: a field with a margin (MakeWarp's default) is sampled
    at the output points, as ITK's ``DisplacementFieldTransform`` samples it
    (trilinear; at the field's own nodes, exact).

    Examples
    --------
    >>> apply = ApplyWarp(order=1)
    >>> apply.inputs.in_file = "sub-01_T1w.nii.gz"  # doctest: +SKIP
    >>> apply.inputs.field = "field.nii.gz"  # doctest: +SKIP
    >>> apply.inputs.jacobian_map = "jacobian.nii.gz"  # doctest: +SKIP
    >>> apply.run().outputs.out_file  # doctest: +SKIP
    '.../corrected.nii.gz'
    """

    input_spec = _ApplyWarpInputSpec
    output_spec = _ApplyWarpOutputSpec

    def _run_interface(self, runtime):
        from ..errors import InputError
        from .compose import resample_once_file

        jac_map = self.inputs.jacobian_map if isdefined(self.inputs.jacobian_map) else None
        if self.inputs.jacobian and jac_map is None:
            raise InputError("ApplyWarp.jacobian_map", "jacobian is on: give the Jacobian map "
                                                       "(or set jacobian=False)")
        out = os.path.join(runtime.cwd, "corrected.nii.gz")
        # A one-step chain: the field, with the Jacobian map sampled where it is applied.
        reference = self.inputs.reference if isdefined(self.inputs.reference) else None
        resample_once_file(self.inputs.in_file, [self.inputs.field], out, reference=reference,
                           jacobian_map=jac_map if self.inputs.jacobian else None,
                           order=self.inputs.order, fill=self.inputs.fill)
        self._results["out_file"] = out
        return runtime
