"""Compose transform chains and resample once: nipype Interfaces and their file-level functions.

Order convention (:mod:`nl_unwarp.compose`): transforms are listed in
**application order** -- the first is applied first to a point of the
reference (target) grid, the last lands in the raw image -- as antspyx
``apply_transforms(transformlist=...)`` and nitransforms ``TransformChain``;
the reverse of ITK ``CompositeTransform``. For an image corrected by our
field ``G`` and registered to a template by an affine ``A`` and a warp ``W``:
``[W, A, G]``.

Intensity (Jacobian) factor: our corrected image is
:math:`I_c(\\mathbf r) = I_{raw}(G(\\mathbf r))\\,\\det J(\\mathbf r)`. Given our
Jacobian map (``--out-jacobian`` / ``out_jacobian``), resampling once
multiplies by :math:`\\det J` at the corrected-space point
:math:`\\mathbf q = A(W(\\mathbf p))`, i.e. where the chain's **last**
transform (the correction) is applied: the result is what correcting with
the factor and then registering gives, in one interpolation.
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
    traits,
)

from ..compose import FIELD_MARGIN_MM
from ._utils import optional

__all__ = ["ComposeTransforms", "MakeComposableField", "ResampleOnce", "compose_transform_files",
           "resample_once_file"]

ORDER_HELP = ("in application order: the first is applied first to a point of the reference grid, the "
              "last lands in the raw image (antspyx transformlist / nitransforms order; the reverse "
              "of ITK CompositeTransform), e.g. warp, affine, correction")
JACOBIAN_HELP = ("our correction's Jacobian determinant map (the warp's Jacobian output): the result is "
                 "multiplied by det J where the chain's last transform (the correction, a displacement "
                 "field) is applied, as correcting with the factor and then registering would")


def _load_transforms(paths) -> list:
    from ..io.transforms import load_chain

    paths = [paths] if isinstance(paths, (str, os.PathLike)) else list(paths)
    return [step for path in paths for step in load_chain(path)]


def _jacobian_step(jacobian_map):
    """Our Jacobian map as a factor step (None without a map)."""
    from ..compose import FactorStep
    from ..io.nifti import load_image

    if jacobian_map is None:
        return None
    image = load_image(jacobian_map)
    return FactorStep(image.data[..., 0] if image.data.ndim == 4 else image.data, image.affine)


def _with_jacobian(chain: list, factor, source) -> list:
    """The chain with the Jacobian factor step just before its last step (the correction)."""
    from ..compose import FieldStep
    from ..errors import InputError

    if factor is None:
        return chain
    if not chain or not isinstance(chain[-1], FieldStep):
        raise InputError(str(source), "a Jacobian map is applied where the correction is, so the "
                                      "chain must end with the correction field; it ends with "
                                      + ("nothing" if not chain else "an affine"))
    return chain[:-1] + [factor, chain[-1]]


def _own_set(sink):
    """``sink`` left to its owner to commit, or a new set committed on leaving the block."""
    import contextlib

    from ..io.atomic import OutputSet

    return contextlib.nullcontext(sink) if sink is not None else OutputSet()


def compose_transform_files(transforms, reference, *, out_field=None, out_composite=None,
                            out_factor=None, raw=None, jacobian_map=None, on_outside: str = "warn",
                            sink=None) -> dict:
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
        The chain un-folded: ITK composite for ``.h5``, X5 for ``.x5`` (no factor: files
        of transforms carry none).
    out_factor : path, optional
        The intensity factor on the reference grid (needs ``jacobian_map``): multiply
        an image resampled through ``out_field`` by it.
    raw : path, optional
        The raw image: only points landing inside it count as uncovered.
    jacobian_map : path, optional
        Our correction's Jacobian determinant map (see module doc).
    on_outside : {"warn", "raise", "ignore"}
        Target points that meet a field outside its grid (ITK would apply identity there).
    sink : OutputSet, optional
        Write into this set (the caller commits it with other outputs); default: a set
        of this call's own, committed on return.

    Returns
    -------
    dict
        ``steps`` (kinds in order), ``uncovered_fraction``, ``max_displacement_mm``,
        and ``factor_min``/``factor_max`` with a Jacobian map.
    """
    import numpy as np

    from ..compose import AffineStep, CoverageError, FactorStep, compose_chain
    from ..errors import InputError
    from ..io.nifti import load_image, write_image
    from ..io.transforms import save_chain, write_itk_field

    if out_field is None and out_composite is None and out_factor is None:
        raise InputError("compose", "give a composed field, a factor map and/or a composite file to write")
    if out_factor is not None and jacobian_map is None:
        raise InputError(str(out_factor), "an intensity factor map needs the Jacobian map (--jacobian-map)")
    plain = _load_transforms(transforms)
    chain = _with_jacobian(plain, _jacobian_step(jacobian_map), jacobian_map)
    ref = load_image(reference)
    raw_img = load_image(raw) if raw is not None else None
    summary = {"steps": ["affine" if isinstance(s, AffineStep) else
                         "factor" if isinstance(s, FactorStep) else "field" for s in chain]}
    with _own_set(sink) as out:
        if out_field is not None or out_factor is not None:
            try:
                composed = compose_chain(chain, ref.spatial_shape, ref.affine,
                                         raw_shape=raw_img.spatial_shape if raw_img else None,
                                         raw_affine=raw_img.affine if raw_img else None,
                                         on_outside=on_outside)
            except CoverageError as exc:
                raise InputError(str(reference), str(exc)) from None
            mag = np.linalg.norm(composed.disp_ras_mm, axis=-1)
            summary.update(uncovered_fraction=composed.uncovered_fraction,
                           max_displacement_mm=float(mag.max()) if mag.size else 0.0)
            if composed.factor is not None:
                summary.update(factor_min=float(composed.factor.min()),
                               factor_max=float(composed.factor.max()))
            if out_field is not None:
                write_itk_field(out, out_field, composed.disp_ras_mm, ref.affine)
            if out_factor is not None:
                write_image(out, out_factor, composed.factor, ref.affine)
        if out_composite is not None:
            save_chain(out, out_composite, plain)
    return summary


def _resample_volume_once(volume, affine, chain, shape, ref_affine, *, order, fill, on_outside):
    """One 3-D volume through the chain (real and imaginary parts of complex data apart)."""
    import numpy as np

    from ..compose import resample_chain

    parts = (volume.real, volume.imag) if np.iscomplexobj(volume) else (volume,)
    results = [resample_chain(np.asarray(p, np.float32), affine, chain, shape, ref_affine, order=order,
                              fill=fill, on_outside=on_outside) for p in parts]
    data = results[0].data if len(results) == 1 else results[0].data + 1j * results[1].data
    return data, results[0].uncovered_fraction


def resample_once_file(source, transforms, out_file, *, reference=None, volume_transforms=None,
                       jacobian_map=None, order: int = 3, fill: float = 0.0,
                       on_outside: str = "warn", sink=None) -> dict:
    """Resample a 3-D or 4-D raw image once through a chain of transform files.

    The chain is followed from every voxel of the reference grid and the raw
    image sampled at its end in one compiled pass: no composed field is
    stored (write one with :func:`compose_transform_files` if a tool needs it).

    Parameters
    ----------
    source : path
        Raw image, 3-D or 4-D (real or complex; integers are resampled as float32).
    transforms : path or sequence of path
        The chain shared by every volume, in application order (module doc), e.g.
        registration warp, affine, our correction.
    out_file : path
        Output image (float32, complex64 for complex input).
    reference : path, optional
        Image whose grid the output is on; default: the source's grid.
    volume_transforms : sequence of path, optional
        One transform per volume (e.g. its motion), applied first, before ``transforms``.
    jacobian_map : path, optional
        Our correction's Jacobian determinant map (module doc); the correction must be
        the chain's last transform.
    order : int
        B-spline order, 0-5.
    fill : float
        Value outside the raw field of view.
    on_outside : {"warn", "raise", "ignore"}
        Target points that meet a field outside its grid.
    sink : OutputSet, optional
        As for :func:`compose_transform_files`.

    Returns
    -------
    dict
        ``uncovered_fraction`` (largest over the volumes), ``volumes``.
    """
    import numpy as np

    from ..compose import CoverageError
    from ..errors import InputError
    from ..io.nifti import load_image, write_image

    image = load_image(source)
    data = image.data
    if not (np.issubdtype(data.dtype, np.number) and data.dtype != np.bool_):
        raise InputError(image.path, f"header field datatype: cannot resample {data.dtype} data")
    volumes = data if data.ndim == 4 else data[..., None]
    ref = load_image(reference) if reference is not None else image
    shared = _load_transforms(transforms)
    per_volume = [None] * volumes.shape[3]
    if volume_transforms is not None:
        per_volume = [_load_transforms(p) for p in volume_transforms]
        if len(per_volume) != volumes.shape[3]:
            raise InputError(str(source), f"{volumes.shape[3]} volumes but {len(per_volume)} volume "
                                          "transforms; give one per volume")
    out = np.empty(ref.spatial_shape + (volumes.shape[3],),
                   np.complex64 if np.iscomplexobj(data) else np.float32, order="F")
    factor = _jacobian_step(jacobian_map)
    uncovered = 0.0
    for t in range(volumes.shape[3]):
        chain = _with_jacobian((per_volume[t] or []) + shared, factor, jacobian_map)
        try:
            out[..., t], frac = _resample_volume_once(np.asarray(volumes[..., t]), image.affine, chain,
                                                      ref.spatial_shape, ref.affine, order=order,
                                                      fill=fill, on_outside=on_outside)
        except CoverageError as exc:
            raise InputError(str(reference or source), str(exc)) from None
        uncovered = max(uncovered, frac)
    with _own_set(sink) as out_set:
        write_image(out_set, out_file, out if data.ndim == 4 else out[..., 0], ref.affine,
                    header=image.header)
    return {"uncovered_fraction": uncovered, "volumes": int(volumes.shape[3])}


class _ComposeTransformsInputSpec(BaseInterfaceInputSpec):
    transforms = InputMultiObject(File(exists=True), mandatory=True, desc="transform files " + ORDER_HELP)
    reference = File(exists=True, mandatory=True, desc="image whose grid the composed field is written on")
    raw = File(exists=True, desc="raw image: only target points landing inside it count as uncovered")
    jacobian_map = File(exists=True, desc=JACOBIAN_HELP + "; written as out_factor on the reference grid")
    on_outside = traits.Enum("warn", "raise", "ignore", usedefault=True,
                             desc="what to do when target points meet a field outside its grid")
    write_field = traits.Bool(True, usedefault=True, desc="write the composed displacement field")
    write_composite = traits.Enum("none", "h5", "x5", usedefault=True,
                                  desc="also write the chain un-folded (ITK composite .h5 or X5)")


class _ComposeTransformsOutputSpec(TraitedSpec):
    out_field = File(exists=True, desc="composed ITK/ANTs displacement field (NIfTI, LPS, intent vector)")
    out_factor = File(exists=True, desc="intensity factor on the reference grid (with a Jacobian map)")
    out_composite = File(desc="the chain un-folded (ITK composite .h5 or X5), if asked for")
    uncovered_fraction = traits.Float(desc="fraction of target points that met a field outside its grid")


class ComposeTransforms(SimpleInterface):
    """Fold a chain of affines and fields into one displacement field on a reference grid."""

    input_spec = _ComposeTransformsInputSpec
    output_spec = _ComposeTransformsOutputSpec

    def _run_interface(self, runtime):
        cwd = Path(runtime.cwd)
        field = cwd / "composed_field.nii.gz" if self.inputs.write_field else None
        jac = optional(self.inputs, "jacobian_map")
        factor = cwd / "composed_factor.nii.gz" if jac is not None else None
        composite = None if self.inputs.write_composite == "none" else \
            cwd / f"composite.{self.inputs.write_composite}"
        summary = compose_transform_files(self.inputs.transforms, self.inputs.reference,
                                          out_field=field, out_composite=composite, out_factor=factor,
                                          raw=optional(self.inputs, "raw"), jacobian_map=jac,
                                          on_outside=self.inputs.on_outside)
        for name, path in (("out_field", field), ("out_factor", factor), ("out_composite", composite)):
            if path is not None:
                self._results[name] = str(path)
        self._results["uncovered_fraction"] = summary.get("uncovered_fraction", 0.0)
        return runtime


class _ResampleOnceInputSpec(BaseInterfaceInputSpec):
    in_file = File(exists=True, mandatory=True, desc="raw image, 3-D or 4-D")
    transforms = InputMultiObject(File(exists=True), mandatory=True,
                                  desc="the chain shared by all volumes, " + ORDER_HELP)
    volume_transforms = InputMultiObject(File(exists=True),
                                         desc="one transform per volume (e.g. its motion), applied first")
    reference = File(exists=True, desc="image whose grid the output is on (default: in_file's grid)")
    jacobian_map = File(exists=True, desc=JACOBIAN_HELP)
    jacobian = traits.Bool(True, usedefault=True,
                           desc="apply the Jacobian map when one is given (set False to ignore it)")
    order = traits.Enum(3, 0, 1, 2, 4, 5, usedefault=True, desc="B-spline interpolation order (3: cubic)")
    fill = traits.Float(0.0, usedefault=True, desc="value outside the raw field of view")
    on_outside = traits.Enum("warn", "raise", "ignore", usedefault=True,
                             desc="what to do when target points meet a field outside its grid")


class _ResampleOnceOutputSpec(TraitedSpec):
    out_file = File(exists=True, desc="the raw image resampled once onto the reference grid (float32)")
    uncovered_fraction = traits.Float(desc="fraction of target points that met a field outside its grid")


class ResampleOnce(SimpleInterface):
    """Resample a raw image once through a chain (plus one transform per volume, if given).

    One pass per volume follows the chain from each reference voxel and samples the raw
    image: no composed field is stored (:class:`ComposeTransforms` writes one).
    """

    input_spec = _ResampleOnceInputSpec
    output_spec = _ResampleOnceOutputSpec

    def _run_interface(self, runtime):
        out = Path(runtime.cwd) / "resampled_once.nii.gz"
        jac = optional(self.inputs, "jacobian_map") if self.inputs.jacobian else None
        summary = resample_once_file(self.inputs.in_file, self.inputs.transforms, out,
                                     reference=optional(self.inputs, "reference"),
                                     volume_transforms=optional(self.inputs, "volume_transforms"),
                                     jacobian_map=jac, order=self.inputs.order, fill=self.inputs.fill,
                                     on_outside=self.inputs.on_outside)
        self._results["out_file"] = str(out)
        self._results["uncovered_fraction"] = summary["uncovered_fraction"]
        return runtime


class _MakeComposableFieldInputSpec(BaseInterfaceInputSpec):
    reference = File(exists=True, mandatory=True, desc="raw image whose field of view the field covers")
    coil_model = File(exists=True, mandatory=True, desc="coil model file (nl_unwarp-coil JSON)")
    patient_position = traits.Str("HFS", usedefault=True, desc="DICOM PatientPosition")
    isocenter_offset_mm = traits.List(traits.Float, minlen=3, maxlen=3,
                                      desc="device coordinates (mm) of the world origin")
    table_position_mm = traits.List(traits.Float, minlen=3, maxlen=3, desc="BIDS TablePosition (mm)")
    margin_mm = traits.Float(FIELD_MARGIN_MM, usedefault=True,
                             desc="margin (mm) beyond the raw field of view on every side (ITK applies "
                                  "identity outside a field's grid)")
    field_spacing_mm = traits.Range(low=0.0, exclude_low=True,
                                    desc="voxel size (mm) of the field's grid, on the raw image's axes "
                                         "(default: the raw image's voxels); read trilinearly")


class _MakeComposableFieldOutputSpec(TraitedSpec):
    out_field = File(exists=True,
                     desc="correction field (ITK/ANTs NIfTI) on the raw grid grown by the margin "
                          "(at field_spacing_mm if given)")
    out_jacobian = File(exists=True, desc="Jacobian determinant map on the raw grid")


class MakeComposableField(SimpleInterface):
    """The correction field for composition: it covers the raw field of view with a margin."""

    input_spec = _MakeComposableFieldInputSpec
    output_spec = _MakeComposableFieldOutputSpec

    def _run_interface(self, runtime):
        from ..api import FrameSpec, WarpOutputs, warp_file

        field = Path(runtime.cwd) / "correction_field.nii.gz"
        jac = Path(runtime.cwd) / "correction_jacobian.nii.gz"
        frame = FrameSpec(self.inputs.patient_position, optional(self.inputs, "table_position_mm", tuple),
                          optional(self.inputs, "isocenter_offset_mm", tuple))
        warp_file(self.inputs.reference, self.inputs.coil_model,
                  WarpOutputs(field=field, jacobian=jac, field_margin_mm=self.inputs.margin_mm,
                              field_spacing_mm=optional(self.inputs, "field_spacing_mm")),
                  frame=frame)
        self._results.update(out_field=str(field), out_jacobian=str(jac))
        return runtime
