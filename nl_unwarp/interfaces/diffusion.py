"""Diffusion weighting under gradient nonlinearity: the file-level function and its nipype Interfaces.

:func:`diffusion_weighting_files` reads a DWI header and its b-table, computes
the coil tensor on the DWI grid (:mod:`nl_unwarp.diffusion`) and writes, as one
:class:`~nl_unwarp.io.atomic.OutputSet`:

* the coil tensor, NIfTI (X, Y, Z, 1, 9) float32, intent GENMATRIX (3 x 3),
  ``L[i, j]`` at component ``3 i + j``, in the frame of the bvec file, with a
  JSON sidecar stating frame, order and units;
* the b-value deviation map, (X, Y, Z, S) float32, one volume per shell;
* a summary JSON (per shell: median and extreme deviation in the mask);
* optionally a single mask-averaged b-table (``.bval``/``.bvec``) and the
  per-voxel tables, streamed volume by volume: b-values (X, Y, Z, N) and
  b-vectors (X, Y, Z, N, 3), intent vector, so that their size never sits in
  memory.
"""

from __future__ import annotations

import gzip
import json
import os
from pathlib import Path

import numpy as np
from nipype.interfaces.base import (
    BaseInterfaceInputSpec,
    File,
    SimpleInterface,
    TraitedSpec,
    traits,
)

from ..frames import PATIENT_POSITIONS
from ._utils import optional

__all__ = ["DiffusionDerivativeFiles", "DiffusionWeighting", "WriteDiffusionDerivatives",
           "diffusion_weighting_files", "tensor_sidecar", "weighting_derivative_files"]

#: Default brain mask: voxels whose mean b = 0 signal exceeds this fraction of
#: its 99th percentile (a crude head mask; common practice, no source).
MASK_FRACTION = 0.1
#: gzip level of streamed per-voxel tables (they are large; level 1 is fast).
STREAM_GZIP_LEVEL = 1


def tensor_sidecar(field, coil_label: str, coil_sha: str | None) -> dict:
    """JSON sidecar of the coil tensor file: frame, component order, units, equation."""
    from ..diffusion import TENSOR_COMPONENTS
    from ..io.bvals import BVEC_FRAME

    return {
        "Description": "Gradient coil tensor L: applied diffusion gradient per unit nominal gradient",
        "NLUnwarpTensor": {
            "Frame": BVEC_FRAME,
            "FrameToRAS": field.ras_from_bvec.tolist(),
            "ComponentOrder": list(TENSOR_COMPONENTS),
            "ComponentIndex": "L[i, j] at component 3 * i + j of the fifth NIfTI dimension (row-major)",
            "Units": "dimensionless",
            "Use": "g_applied = L @ g_nominal; b_eff = b * |L g|^2; g_eff = L g / |L g|",
            "Grid": "true (corrected) positions: the grid of the corrected DWI",
            "CoilModel": {"label": coil_label, "sha256": coil_sha},
            "LatticeMM": field.lattice_mm,
            "InterpolationError": field.interpolation_error,
        },
    }


def _dwi_grid(path: str):
    """Header of a DWI (no data read): the image proxy, its volumes and affine."""
    import nibabel as nib

    from ..errors import InputError

    if not Path(path).exists():
        raise InputError(path, "image file not found")
    try:
        img = nib.load(path)
    except Exception as exc:  # nibabel raises many types for a broken file
        raise InputError(path, f"unreadable NIfTI ({exc})") from None
    if int(img.header["qform_code"]) == 0 and int(img.header["sform_code"]) == 0:
        raise InputError(path, "header fields qform_code and sform_code are both 0: the b-vector frame "
                               "is unknown")
    if len(img.shape) not in (3, 4):
        raise InputError(path, f"header field dim: {len(img.shape)}-D data; a DWI is 3-D or 4-D")
    volumes = img.shape[3] if len(img.shape) == 4 else 1
    return img, volumes, np.asarray(img.affine, dtype=float)


def _default_mask(img, bvals: np.ndarray, outside: np.ndarray) -> np.ndarray:
    """Inside the valid radius, and bright on the mean b = 0 image (if there is one)."""
    from ..diffusion import B0_THRESHOLD

    zero = np.flatnonzero(bvals <= B0_THRESHOLD)
    if zero.size == 0 or len(img.shape) == 3:
        return ~outside
    mean_b0 = np.zeros(img.shape[:3])
    for index in zero:
        mean_b0 += np.asarray(img.dataobj[..., int(index)], dtype=float)
    mean_b0 /= zero.size
    bright = mean_b0 > MASK_FRACTION * np.percentile(mean_b0, 99)
    return bright & ~outside


def _load_mask(path: str, shape, affine) -> np.ndarray:
    import nibabel as nib

    from ..errors import InputError

    img = nib.load(path)
    if tuple(img.shape[:3]) != tuple(shape) or not np.allclose(img.affine, affine, atol=1e-3):
        raise InputError(path, "the mask's grid (shape or affine) differs from the DWI's")
    return np.asarray(img.dataobj).reshape(shape) > 0


def _stream_header(shape, affine, *, intent: str | None = None):
    import nibabel as nib

    hdr = nib.Nifti1Header()
    hdr.set_data_shape(shape)
    hdr.set_data_dtype(np.float32)
    hdr.set_qform(affine, code=1)
    hdr.set_sform(affine, code=1)
    hdr.set_xyzt_units("mm")
    if intent is not None:
        hdr.set_intent(intent)
    return hdr


def _stream_write(outputs, path, hdr, blocks) -> None:
    """Write a NIfTI from float32 blocks given in file (Fortran) order, one at a time."""
    tmp = outputs.reserve(path)
    opener = ((lambda p: gzip.open(p, "wb", compresslevel=STREAM_GZIP_LEVEL))
              if str(path).endswith(".gz") else (lambda p: open(p, "wb")))
    with opener(tmp) as f:
        hdr.write_to(f)
        f.write(b"\0" * (int(hdr.get_data_offset()) - f.tell()))
        for block in blocks:
            f.write(np.asarray(block, dtype=np.float32).tobytes(order="F"))


def _voxel_tables(outputs, field, bvals, bvecs, out_bvals, out_bvecs) -> None:
    """Per-voxel b-values (X, Y, Z, N) and b-vectors (X, Y, Z, N, 3), one volume in memory at a time."""
    from ..diffusion import effective_volume

    shape, n = field.shape, len(bvals)
    if out_bvals:
        hdr = _stream_header(shape + (n,), field.affine)
        _stream_write(outputs, out_bvals, hdr,
                      (bvals[v] * effective_volume(field.tensor, bvecs[v])[0] for v in range(n)))
    if out_bvecs:
        # Component slowest (NIfTI vector layout): each volume is recomputed per component
        # rather than held, which keeps memory at one volume.
        hdr = _stream_header(shape + (n, 3), field.affine, intent="vector")
        _stream_write(outputs, out_bvecs, hdr,
                      (effective_volume(field.tensor, bvecs[v])[1][..., c]
                       for c in range(3) for v in range(n)))


def _write_tensor(outputs, path, field) -> None:
    """(X, Y, Z, 1, 9) float32, NIfTI intent GENMATRIX with p1 = p2 = 3 (row-major, nifti1.h)."""
    import nibabel as nib

    img = nib.Nifti1Image(field.tensor.reshape(field.shape + (1, 9), order="F"), field.affine)
    img.set_qform(field.affine, code=1)
    img.set_sform(field.affine, code=1)
    img.header.set_intent("general matrix", (3, 3))
    img.header.set_xyzt_units("mm")
    nib.save(img, str(outputs.reserve(path)))


def _read_table(dwi: str, bval: str, bvec: str, volumes: int):
    from ..errors import InputError
    from ..io.bvals import read_bvals, read_bvecs

    bvals, bvecs = read_bvals(bval), read_bvecs(bvec)
    if len(bvals) != volumes or len(bvecs) != volumes:
        raise InputError(dwi, f"{volumes} volume(s), but {len(bvals)} b-value(s) in {bval} and "
                              f"{len(bvecs)} b-vector(s) in {bvec}")
    return bvals, bvecs


def _coil_and_frame(coil, frame_spec):
    from ..api import FrameSpec, make_frame
    from ..coil import CoilModel
    from ..io.coilfile import coil_sha256, load_coil

    model = coil if isinstance(coil, CoilModel) else load_coil(coil)
    sha = None if isinstance(coil, CoilModel) else coil_sha256(coil)
    frame, origin = make_frame(frame_spec or FrameSpec())
    return model, sha, frame, origin


def diffusion_weighting_files(dwi, bval, bvec, coil, *, frame=None, mask=None, out_tensor=None,
                              out_deviation=None, out_summary=None, out_mean_bval=None,
                              out_mean_bvec=None, out_voxel_bvals=None, out_voxel_bvecs=None) -> dict:
    """Coil tensor, b-value deviation maps and effective b-tables of a DWI series.

    Parameters
    ----------
    dwi : path
        The DWI series (only its header and b = 0 volumes are read).
    bval, bvec : path
        Its BIDS/FSL b-table (vectors in the image-axes frame).
    coil : path or CoilModel
    frame : nl_unwarp.api.FrameSpec, optional
        Patient position and table (default HFS, isocenter at the origin).
    mask : path, optional
        Brain mask on the DWI grid; default: bright on the mean b = 0 image
        and inside the coil model's valid radius.
    out_tensor, out_deviation, out_summary, out_mean_bval, out_mean_bvec,
    out_voxel_bvals, out_voxel_bvecs : path, optional
        Products (see the module notes); the tensor's sidecar is written
        beside it (``.json``).

    Returns
    -------
    dict
        The summary.
    """
    from .. import __version__
    from ..diffusion import compute_coil_tensor, mask_mean_table, split_shells, weighting_summary
    from ..errors import InputError
    from ..io.atomic import OutputSet
    from ..io.bvals import ras_from_bvec_frame, write_bvals, write_bvecs
    from ..io.nifti import write_image

    dwi = str(dwi)
    img, volumes, affine = _dwi_grid(dwi)
    bvals, bvecs = _read_table(dwi, bval, bvec, volumes)
    model, sha, dev_frame, origin = _coil_and_frame(coil, frame)
    try:
        ras_from_bvec = ras_from_bvec_frame(affine)
    except ValueError as exc:
        raise InputError(dwi, str(exc)) from None
    field = compute_coil_tensor(model, img.shape[:3], affine, dev_frame, ras_from_bvec=ras_from_bvec)
    region = (_load_mask(str(mask), field.shape, affine) if mask
              else _default_mask(img, bvals, field.outside_valid))
    if not region.any():
        raise InputError(str(mask or dwi), "the brain mask is empty")
    shells = split_shells(bvals)
    summary, maps = weighting_summary(field, bvals, bvecs, region, shells=shells)
    summary = {"software": {"name": "nl_unwarp", "version": __version__},
               "coil_model": {"label": model.label, "sha256": sha, "degree": model.degree},
               "patient_position": dev_frame.position, "isocenter_offset_from": origin,
               "isocenter_ras_mm": [float(v) for v in dev_frame.isocenter_ras_mm],
               "mask": "given" if mask else "default (mean b=0 image and valid radius)",
               "outside_valid_fraction": float(field.outside_valid.mean()), **summary}
    with OutputSet() as out:
        if out_tensor:
            _write_tensor(out, out_tensor, field)
            sidecar = Path(str(out_tensor).removesuffix(".gz").removesuffix(".nii") + ".json")
            out.reserve(sidecar).write_text(json.dumps(tensor_sidecar(field, model.label, sha), indent=2)
                                            + "\n", encoding="utf-8")
        if out_deviation:
            write_image(out, out_deviation, maps, affine)
        if out_summary:
            out.reserve(out_summary).write_text(json.dumps(summary, indent=2) + "\n", encoding="utf-8")
        if out_mean_bval or out_mean_bvec:
            mean_b, mean_g = mask_mean_table(field, region, bvals, bvecs)
            if out_mean_bval:
                write_bvals(out, out_mean_bval, mean_b)
            if out_mean_bvec:
                write_bvecs(out, out_mean_bvec, mean_g)
        _voxel_tables(out, field, bvals, bvecs, out_voxel_bvals, out_voxel_bvecs)
    return summary


class _DiffusionWeightingInputSpec(BaseInterfaceInputSpec):
    in_file = File(exists=True, mandatory=True, desc="DWI series (its grid; only b=0 volumes are read)")
    in_bval = File(exists=True, mandatory=True, desc="b-values (BIDS/FSL .bval)")
    in_bvec = File(exists=True, mandatory=True, desc="b-vectors (BIDS/FSL .bvec, image-axes frame)")
    coil_model = File(exists=True, mandatory=True, desc="coil model file (nl_unwarp-coil JSON)")
    patient_position = traits.Enum(*PATIENT_POSITIONS, usedefault=True,
                                   desc="DICOM PatientPosition of the patient in the scanner")
    table_position_mm = traits.List(traits.Float, minlen=3, maxlen=3, desc="BIDS TablePosition (mm)")
    isocenter_offset_mm = traits.List(traits.Float, minlen=3, maxlen=3,
                                      desc="device coordinates (mm) of the world origin; overrides "
                                           "table_position_mm")
    mask = File(exists=True, desc="brain mask on the DWI grid (default: from the mean b=0 image)")
    voxel_tables = traits.Bool(False, usedefault=True,
                               desc="also write per-voxel b-values and b-vectors (large)")


class _DiffusionWeightingOutputSpec(TraitedSpec):
    out_tensor = File(exists=True, desc="coil tensor (X, Y, Z, 1, 9), bvec frame")
    out_tensor_sidecar = File(exists=True, desc="the tensor's JSON sidecar (frame, order, units)")
    out_deviation = File(exists=True, desc="b-value deviation b_eff/b - 1, one volume per shell")
    out_summary = File(exists=True, desc="summary JSON (per shell: median and extremes in the mask)")
    out_mean_bval = File(exists=True, desc="mask-averaged effective b-values")
    out_mean_bvec = File(exists=True, desc="mask-averaged effective b-vectors")
    out_voxel_bvals = File(desc="per-voxel b-values (X, Y, Z, N), with voxel_tables")
    out_voxel_bvecs = File(desc="per-voxel b-vectors (X, Y, Z, N, 3), with voxel_tables")


class DiffusionWeighting(SimpleInterface):
    """Coil tensor and effective diffusion weighting of a DWI series.

    Calls :func:`diffusion_weighting_files`.

    Examples
    --------
    >>> dw = DiffusionWeighting()
    >>> dw.inputs.in_file = "sub-01_dwi.nii.gz"  # doctest: +SKIP
    >>> dw.inputs.in_bval = "sub-01_dwi.bval"  # doctest: +SKIP
    >>> dw.inputs.in_bvec = "sub-01_dwi.bvec"  # doctest: +SKIP
    >>> dw.inputs.coil_model = "meridian45.json"  # doctest: +SKIP
    >>> dw.run().outputs.out_deviation  # doctest: +SKIP
    '.../bdeviation.nii.gz'
    """

    input_spec = _DiffusionWeightingInputSpec
    output_spec = _DiffusionWeightingOutputSpec

    def _run_interface(self, runtime):
        from ..api import FrameSpec

        names = {"tensor": "coiltensor.nii.gz", "tensor_sidecar": "coiltensor.json",
                 "deviation": "bdeviation.nii.gz", "summary": "weighting.json",
                 "mean_bval": "mean.bval", "mean_bvec": "mean.bvec"}
        if self.inputs.voxel_tables:
            names.update(voxel_bvals="voxel_bvals.nii", voxel_bvecs="voxel_bvecs.nii")
        paths = {k: os.path.join(runtime.cwd, v) for k, v in names.items()}

        frame = FrameSpec(self.inputs.patient_position,
                          optional(self.inputs, "table_position_mm", tuple),
                          optional(self.inputs, "isocenter_offset_mm", tuple))
        diffusion_weighting_files(
            self.inputs.in_file, self.inputs.in_bval, self.inputs.in_bvec, self.inputs.coil_model,
            frame=frame, mask=optional(self.inputs, "mask"),
            out_tensor=paths["tensor"], out_deviation=paths["deviation"], out_summary=paths["summary"],
            out_mean_bval=paths["mean_bval"], out_mean_bvec=paths["mean_bvec"],
            out_voxel_bvals=paths.get("voxel_bvals"), out_voxel_bvecs=paths.get("voxel_bvecs"))
        self._results.update({f"out_{k}": v for k, v in paths.items()})
        return runtime


class _DiffusionDerivativeFilesInputSpec(BaseInterfaceInputSpec):
    source_relpath = traits.Str(mandatory=True, desc="source DWI path relative to the raw dataset")
    metadata = traits.Dict(mandatory=True, desc="source sidecar metadata (inheritance applied)")
    decision = traits.Dict(mandatory=True, desc="decision record (from DecideCorrection)")
    companions = traits.Dict(traits.Str, traits.Str, usedefault=True,
                             desc="companions already planned (bval, bvec): kept")
    tensor = File(exists=True, mandatory=True, desc="coil tensor (from DiffusionWeighting)")
    tensor_sidecar = File(exists=True, mandatory=True, desc="its sidecar (from DiffusionWeighting)")
    deviation = File(exists=True, mandatory=True, desc="b-value deviation map")
    summary = File(exists=True, mandatory=True, desc="weighting summary JSON")


class _DiffusionDerivativeFilesOutputSpec(TraitedSpec):
    companions = traits.Dict(traits.Str, traits.Str,
                             desc="destination (relative to the derivatives root) -> file, for the sink")


def weighting_derivative_files(cwd, source_relpath: str, metadata: dict, decision: dict, *, tensor,
                               tensor_sidecar, deviation, summary) -> dict[str, str]:
    """The DWI's weighting products under their derivative names, with their BIDS sidecars.

    Returns destination (relative to the derivatives root) -> file in ``cwd``,
    to be written by the image's sink in the same set as its other derivatives.
    """
    from ..bids.derivatives import sidecar_document
    from ..bids.names import derivative_name

    doc = json.loads(Path(summary).read_text(encoding="utf-8"))
    record = {k: decision.get(k) for k in ("action", "reason", "rule", "site", "warnings")}
    provenance = {"software": doc["software"], "coil_model": doc["coil_model"], "decision": record,
                  "weighting": {k: v for k, v in doc.items() if k not in ("software", "coil_model")}}
    shells = [{k: s[k] for k in ("bval", "volumes", "median_deviation", "min_deviation", "max_deviation")}
              for s in doc["shells"]]
    extra = {"coiltensor": {"NLUnwarpTensor": json.loads(Path(tensor_sidecar).read_text())["NLUnwarpTensor"]},
             "bdeviation": {"NLUnwarpShells": shells}}
    out = {}
    for kind, path in (("coiltensor", tensor), ("bdeviation", deviation)):
        sidecar = sidecar_document(kind, source_relpath, metadata, provenance)
        sidecar.update(extra[kind])
        side_path = os.path.join(cwd, f"{kind}.json")
        Path(side_path).write_text(json.dumps(sidecar, indent=2) + "\n", encoding="utf-8")
        out[derivative_name(source_relpath, kind)] = str(path)
        out[derivative_name(source_relpath, kind, ext=".json")] = side_path
    return out


class DiffusionDerivativeFiles(SimpleInterface):
    """Name a DWI's weighting products for the derivatives sink and write their sidecars.

    The result is merged into the image sink's ``companions``, so that the
    DWI's corrected series, field, bval/bvec, coil tensor and b-value maps are
    written as one set (all or none). The tensor's sidecar carries its frame
    and order (``NLUnwarpTensor``), the deviation map's the per-shell figures
    (``NLUnwarpShells``).
    """

    input_spec = _DiffusionDerivativeFilesInputSpec
    output_spec = _DiffusionDerivativeFilesOutputSpec

    def _run_interface(self, runtime):
        files = weighting_derivative_files(
            runtime.cwd, self.inputs.source_relpath, self.inputs.metadata, self.inputs.decision,
            tensor=self.inputs.tensor, tensor_sidecar=self.inputs.tensor_sidecar,
            deviation=self.inputs.deviation, summary=self.inputs.summary)
        self._results["companions"] = {**self.inputs.companions, **files}
        return runtime


class _WriteDiffusionDerivativesInputSpec(BaseInterfaceInputSpec):
    out_dir = traits.Str(mandatory=True, desc="root of the derivatives dataset")
    source_relpath = traits.Str(mandatory=True, desc="source DWI path relative to the raw dataset")
    metadata = traits.Dict(mandatory=True, desc="source sidecar metadata (inheritance applied)")
    companions = traits.Dict(traits.Str, traits.Str, mandatory=True,
                             desc="destination -> file (from DiffusionDerivativeFiles)")


class _WriteDiffusionDerivativesOutputSpec(TraitedSpec):
    out_files = traits.List(File(exists=True), desc="files written into the derivatives dataset")


class WriteDiffusionDerivatives(SimpleInterface):
    """Write a DWI's weighting products alone (when its geometry is left as the scanner made it).

    Calls :func:`nl_unwarp.bids.derivatives.write_image_derivatives` with the
    files of :class:`DiffusionDerivativeFiles`, as one set.
    """

    input_spec = _WriteDiffusionDerivativesInputSpec
    output_spec = _WriteDiffusionDerivativesOutputSpec
    always_run = True

    def _run_interface(self, runtime):
        from ..bids.derivatives import write_image_derivatives

        written = write_image_derivatives(self.inputs.out_dir, self.inputs.source_relpath,
                                          metadata=self.inputs.metadata, provenance={}, files={},
                                          companions=self.inputs.companions)
        self._results["out_files"] = [str(p) for p in written]
        return runtime
