"""Compose transform chains and resample once: nipype Interfaces and their file-level functions.

Order convention (:mod:`nl_unwarp.compose`): transforms are listed in
**application order** -- the first is applied first to a point of the
reference (target) grid, the last lands in the raw image -- as antspyx
``apply_transforms(transformlist=...)`` and nitransforms ``TransformChain``;
the reverse of ITK ``CompositeTransform``. For an image corrected by our
field ``G`` and registered to a template by an affine ``A`` and a warp ``W``:
``[W, A, G]``.
"""

from __future__ import annotations

import os
from pathlib import Path

from nipype.interfaces.base import (
    BaseInterfaceInputSpec,
    File,
    InputMultiObject,
    SimpleInterface,
    TraitedSpec,
    isdefined,
    traits,
)

__all__ = ["ComposeTransforms", "MakeComposableField", "ResampleOnce", "compose_transform_files",
           "resample_once_file"]

ORDER_HELP = ("in application order: the first is applied first to a point of the reference grid, the "
              "last lands in the raw image (antspyx transformlist / nitransforms order; the reverse "
              "of ITK CompositeTransform), e.g. warp, affine, correction")


def compose_transform_files(transforms, reference, *, out_field=None, out_composite=None,
                            raw=None, on_outside: str = "warn") -> dict:
    """Fold transform files into one ITK displacement field on a reference grid.

    Parameters
    ----------
    transforms : sequence of path
        ITK affines (.txt, .tfm, .mat), ITK/ANTs fields (.nii[.gz]), ITK
        composite (.h5) or X5 chains, in application order (see module doc).
    reference : path
        Image whose grid the composed field is written on.
    out_field : path, optional
        ITK/ANTs displacement field (NIfTI, LPS, intent vector) to write.
    out_composite : path, optional
        The chain un-folded: ITK composite for ``.h5``, X5 for ``.x5``.
    raw : path, optional
        The raw image: only points landing inside it count as uncovered.
    on_outside : {"warn", "raise", "ignore"}

    Returns
    -------
    dict
        ``steps`` (kinds in order), ``uncovered_fraction``, ``max_displacement_mm``.
    """
    import numpy as np

    from ..compose import AffineStep, CoverageError, compose_chain
    from ..errors import InputError
    from ..io.atomic import OutputSet
    from ..io.nifti import load_image
    from ..io.transforms import load_chain, save_chain, write_itk_field

    if out_field is None and out_composite is None:
        raise InputError("compose", "give a composed field and/or a composite file to write")
    chain = [step for path in transforms for step in load_chain(path)]
    ref = load_image(reference)
    raw_img = load_image(raw) if raw is not None else None
    summary = {"steps": ["affine" if isinstance(s, AffineStep) else "field" for s in chain]}
    with OutputSet() as out:
        if out_field is not None:
            try:
                composed = compose_chain(chain, ref.spatial_shape, ref.affine,
                                         raw_shape=raw_img.spatial_shape if raw_img else None,
                                         raw_affine=raw_img.affine if raw_img else None,
                                         on_outside=on_outside)
            except CoverageError as exc:
                raise InputError(str(reference), str(exc)) from None
            write_itk_field(out, out_field, composed.disp_ras_mm, ref.affine)
            mag = np.linalg.norm(composed.disp_ras_mm, axis=-1)
            summary.update(uncovered_fraction=composed.uncovered_fraction,
                           max_displacement_mm=float(mag.max()) if mag.size else 0.0)
        if out_composite is not None:
            save_chain(out, out_composite, chain)
    return summary


def resample_once_file(source, fields, out_file, *, order: int = 3, fill: float = 0.0) -> Path:
    """Resample a 3-D or 4-D image through composed field(s), onto the fields' grid.

    ``fields`` holds one ITK field for every volume, or one for all volumes.
    """
    import numpy as np

    from ..errors import InputError
    from ..io.atomic import OutputSet
    from ..io.itk import read_itk_field
    from ..io.nifti import load_image, write_image
    from ..resample import resample_volume

    image = load_image(source)
    data = image.data if image.data.ndim == 4 else image.data[..., None]
    fields = [fields] if isinstance(fields, (str, os.PathLike)) else list(fields)
    if len(fields) not in (1, data.shape[3]):
        raise InputError(str(source), f"{data.shape[3]} volumes but {len(fields)} fields; give one "
                                      "field, or one per volume")
    first, affine = read_itk_field(fields[0])
    out = np.empty(first.shape[:3] + (data.shape[3],), np.float32)
    for t in range(data.shape[3]):
        disp, aff = (first, affine) if len(fields) == 1 or t == 0 else read_itk_field(fields[t])
        if disp.shape != first.shape or not np.allclose(aff, affine, atol=1e-4):
            raise InputError(str(fields[t]), "field is not on the grid of the first field")
        out[..., t] = resample_volume(np.asarray(data[..., t], np.float32), image.affine, disp, affine,
                                      order=order, fill=fill)
    with OutputSet() as sink:
        write_image(sink, out_file, out if image.data.ndim == 4 else out[..., 0], affine,
                    header=image.header)
    return Path(out_file)


class _ComposeTransformsInputSpec(BaseInterfaceInputSpec):
    transforms = InputMultiObject(File(exists=True), mandatory=True, desc="transform files " + ORDER_HELP)
    reference = File(exists=True, mandatory=True, desc="image whose grid the composed field is written on")
    raw = File(exists=True, desc="raw image: only target points landing inside it count as uncovered")
    on_outside = traits.Enum("warn", "raise", "ignore", usedefault=True,
                             desc="what to do when target points meet a field outside its grid")
    write_composite = traits.Enum("none", "h5", "x5", usedefault=True,
                                  desc="also write the chain un-folded (ITK composite .h5 or X5)")


class _ComposeTransformsOutputSpec(TraitedSpec):
    out_field = File(exists=True, desc="composed ITK/ANTs displacement field (NIfTI, LPS, intent vector)")
    out_composite = File(desc="the chain un-folded (ITK composite .h5 or X5), if asked for")
    uncovered_fraction = traits.Float(desc="fraction of target points that met a field outside its grid")


class ComposeTransforms(SimpleInterface):
    """Fold a chain of affines and fields into one displacement field on a reference grid."""

    input_spec = _ComposeTransformsInputSpec
    output_spec = _ComposeTransformsOutputSpec

    def _run_interface(self, runtime):
        cwd = Path(runtime.cwd)
        field = cwd / "composed_field.nii.gz"
        composite = None if self.inputs.write_composite == "none" else \
            cwd / f"composite.{self.inputs.write_composite}"
        raw = self.inputs.raw if self.inputs.raw else None
        summary = compose_transform_files(self.inputs.transforms, self.inputs.reference,
                                          out_field=field, out_composite=composite, raw=raw,
                                          on_outside=self.inputs.on_outside)
        self._results["out_field"] = str(field)
        if composite is not None:
            self._results["out_composite"] = str(composite)
        self._results["uncovered_fraction"] = summary["uncovered_fraction"]
        return runtime


class _ResampleOnceInputSpec(BaseInterfaceInputSpec):
    in_file = File(exists=True, mandatory=True, desc="raw image, 3-D or 4-D")
    fields = InputMultiObject(File(exists=True), mandatory=True,
                              desc="composed field(s) on the output grid: one, or one per volume")
    order = traits.Enum(3, 0, 1, 2, 4, 5, usedefault=True, desc="B-spline interpolation order (3: cubic)")
    fill = traits.Float(0.0, usedefault=True, desc="value outside the raw field of view")


class _ResampleOnceOutputSpec(TraitedSpec):
    out_file = File(exists=True, desc="the raw image resampled once onto the fields' grid (float32)")


class ResampleOnce(SimpleInterface):
    """Resample a raw image once through composed field(s) (one per volume, or one for all)."""

    input_spec = _ResampleOnceInputSpec
    output_spec = _ResampleOnceOutputSpec

    def _run_interface(self, runtime):
        out = Path(runtime.cwd) / "resampled_once.nii.gz"
        resample_once_file(self.inputs.in_file, self.inputs.fields, out, order=self.inputs.order,
                           fill=self.inputs.fill)
        self._results["out_file"] = str(out)
        return runtime


class _MakeComposableFieldInputSpec(BaseInterfaceInputSpec):
    reference = File(exists=True, mandatory=True, desc="raw image whose field of view the field covers")
    coil_model = File(exists=True, mandatory=True, desc="coil model file (nl_unwarp-coil JSON)")
    patient_position = traits.Str("HFS", usedefault=True, desc="DICOM PatientPosition")
    isocenter_offset_mm = traits.List(traits.Float, minlen=3, maxlen=3,
                                      desc="device coordinates (mm) of the world origin")
    table_position_mm = traits.List(traits.Float, minlen=3, maxlen=3, desc="BIDS TablePosition (mm)")
    # Same default as nl_unwarp.api.FIELD_MARGIN_MM (not imported here: heavy).
    margin_mm = traits.Float(20.0, usedefault=True,
                             desc="margin (mm) beyond the raw field of view on every side (ITK applies "
                                  "identity outside a field's grid)")


class _MakeComposableFieldOutputSpec(TraitedSpec):
    out_field = File(exists=True,
                     desc="correction field (ITK/ANTs NIfTI) on the raw grid grown by the margin")
    out_jacobian = File(exists=True, desc="Jacobian determinant map on the raw grid")


class MakeComposableField(SimpleInterface):
    """The correction field for composition: it covers the raw field of view with a margin."""

    input_spec = _MakeComposableFieldInputSpec
    output_spec = _MakeComposableFieldOutputSpec

    def _run_interface(self, runtime):
        from ..api import FrameSpec, WarpOutputs, warp_file

        def given(name):
            value = getattr(self.inputs, name)
            return tuple(value) if isdefined(value) else None

        field = Path(runtime.cwd) / "correction_field.nii.gz"
        jac = Path(runtime.cwd) / "correction_jacobian.nii.gz"
        frame = FrameSpec(self.inputs.patient_position, given("table_position_mm"),
                          given("isocenter_offset_mm"))
        warp_file(self.inputs.reference, self.inputs.coil_model,
                  WarpOutputs(field=field, jacobian=jac, field_margin_mm=self.inputs.margin_mm),
                  frame=frame)
        self._results.update(out_field=str(field), out_jacobian=str(jac))
        return runtime
