"""Library entry points that join files to the math: make a warp, correct an image.

These are what the CLI and the nipype interfaces call. Each writes its outputs
as one :class:`~nl_unwarp.io.atomic.OutputSet`: all files appear, or none.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import __version__
from .coil import CoilModel
from .compose import FIELD_MARGIN_MM, FieldStep, grid_with_margin, margin_slices, sample_field
from .errors import InputError
from .frames import DeviceFrame, offset_from_table_position
from .io.atomic import OutputSet
from .io.coilfile import coil_sha256, load_coil
from .io.itk import write_itk_field
from .io.nifti import LoadedImage, load_image, write_image
from .resample import correct_image
from .warp import WarpField, compute_warp, default_slice_axis, index_to_ras

__all__ = [
    "FIELD_MARGIN_MM",
    "FrameSpec",
    "WarpOutputs",
    "check_field_spacing",
    "correct_file",
    "displacement_table",
    "field_grid_summary",
    "make_frame",
    "warp_file",
    "warp_summary",
]

log = logging.getLogger("nl_unwarp")

@dataclass
class FrameSpec:
    """How the patient sat in the scanner.

    Parameters
    ----------
    position : str
        DICOM PatientPosition (HFS, HFP, FFS, FFP, HFDR, HFDL, FFDR, FFDL).
    table_position_mm : sequence of 3 float, optional
        BIDS TablePosition.
    isocenter_offset_mm : sequence of 3 float, optional
        Device coordinates of the world origin; overrides the table position.
    """

    position: str = "HFS"
    table_position_mm: tuple[float, float, float] | None = None
    isocenter_offset_mm: tuple[float, float, float] | None = None


def make_frame(spec: FrameSpec) -> tuple[DeviceFrame, str]:
    """Build the device frame and say where its isocenter offset came from.

    Returns
    -------
    frame : DeviceFrame
    origin : str
        ``"isocenter offset given"``, ``"table position"`` or ``"default (zeros)"``;
        the default is also logged as a warning.
    """
    try:
        if spec.isocenter_offset_mm is not None:
            return DeviceFrame(spec.position, spec.isocenter_offset_mm), "isocenter offset given"
        if spec.table_position_mm is not None:
            offset = offset_from_table_position(spec.table_position_mm)
            return DeviceFrame(spec.position, offset), "table position"
        frame = DeviceFrame(spec.position)
    except ValueError as exc:
        raise InputError("--position/--table-position/--isocenter-offset", str(exc)) from None
    log.warning("no table position or isocenter offset given: assuming the world origin is "
                "the gradient isocenter")
    return frame, "default (zeros)"


@dataclass
class WarpOutputs:
    """Paths of the warp products (each optional).

    ``field_margin_mm`` grows the grid of the field file (only) by that margin
    on every side, so that it covers the raw field of view when it is composed
    with registration transforms or applied by ITK-style tools (default
    :data:`FIELD_MARGIN_MM`); 0 writes it on the raw grid. ``field_spacing_mm``
    gives that grid another voxel size (isotropic, the image's axes; default:
    the image's voxels): a 2 mm field of a smooth gradient system is an eighth
    of the size of a 1 mm one to write, store and read, at the price of its
    trilinear interpolation, which the summary reports
    (``field_grid.deviation_max_mm``). The other maps are always on the raw
    (reference) grid, voxel for voxel with the image.
    """

    field: str | Path | None = None
    jacobian: str | Path | None = None
    magnitude: str | Path | None = None
    mask: str | Path | None = None
    summary: str | Path | None = None
    field_margin_mm: float = FIELD_MARGIN_MM
    field_spacing_mm: float | None = None

    def __post_init__(self) -> None:
        if not np.isfinite(self.field_margin_mm) or self.field_margin_mm < 0:
            raise InputError("--field-margin", f"{self.field_margin_mm}: give a margin >= 0 mm")
        check_field_spacing(self.field_spacing_mm)


def check_field_spacing(spacing_mm: float | None) -> None:
    """Refuse a field voxel size (mm) that is given and is not a finite number > 0."""
    if spacing_mm is not None and not (np.isfinite(spacing_mm) and spacing_mm > 0):
        raise InputError("--field-spacing", f"{spacing_mm}: give a voxel size > 0 mm")


def displacement_table(coil: CoilModel, radii_mm=(50.0, 100.0, 150.0, 200.0),
                       points: int = 4000) -> list[dict]:
    """Largest and RMS displacement magnitude (mm) on spheres about the isocenter.

    Uses a Fibonacci sphere of ``points`` directions (even coverage).
    """
    k = np.arange(points) + 0.5
    polar = np.arccos(1 - 2 * k / points)
    azimuth = np.pi * (1 + 5**0.5) * k
    unit = np.stack([np.sin(polar) * np.cos(azimuth), np.sin(polar) * np.sin(azimuth),
                     np.cos(polar)], -1)
    rows = []
    for radius in radii_mm:
        mag = np.linalg.norm(coil.displacement(unit * radius), axis=-1)
        rows.append({"radius_mm": float(radius), "max_mm": float(mag.max()),
                     "rms_mm": float(np.sqrt(np.mean(mag**2))),
                     "inside_valid_radius": bool(radius <= coil.valid_radius_mm)})
    return rows


def warp_summary(warp: WarpField, coil: CoilModel, coil_path: str | Path | None,
                 frame: DeviceFrame, frame_origin: str) -> dict:
    """JSON-ready description of a warp (no paths of coil files: only their hash)."""
    mag = warp.magnitude_mm
    inside = ~warp.outside_valid
    return {
        "software": {"name": "nl_unwarp", "version": __version__},
        "coil_model": {"label": coil.label,
                       "sha256": coil_sha256(coil_path) if coil_path else None,
                       "degree": coil.degree, "valid_radius_mm": coil.valid_radius_mm},
        "patient_position": frame.position,
        "isocenter_offset_mm": [float(v) for v in frame.isocenter_offset_mm],
        "isocenter_offset_from": frame_origin,
        "isocenter_ras_mm": [float(v) for v in frame.isocenter_ras_mm],
        "mode": warp.mode,
        "slice_axis": warp.slice_axis,
        "displacement_max_mm": float(mag.max()),
        "displacement_p99_mm": float(np.percentile(mag, 99)),
        "displacement_max_inside_valid_mm": float(mag[inside].max()) if inside.any() else None,
        "jacobian_min": float(warp.jacobian.min()),
        "jacobian_max": float(warp.jacobian.max()),
        "outside_valid_fraction": warp.outside_fraction,
        "lattice_mm": warp.lattice_mm,
        "interpolation_error_mm": warp.interpolation_error_mm,
        "jacobian_interpolation_error": warp.jacobian_interpolation_error,
    }


def _load_coil_any(coil: CoilModel | str | Path) -> tuple[CoilModel, Path | None]:
    if isinstance(coil, CoilModel):
        return coil, None
    return load_coil(coil), Path(coil)


def _warn_outside(warp: WarpField, image_path: str) -> None:
    if warp.outside_fraction > 0:
        log.warning("%s: %.1f %% of voxels lie beyond the coil model's valid radius; "
                    "their correction is extrapolated (see the mask output)",
                    image_path, 100 * warp.outside_fraction)


def _interior(grown: WarpField, shape: tuple[int, int, int], affine: np.ndarray) -> WarpField:
    """The warp on the raw grid as views into the warp on the grown grid (the same numbers)."""
    inner = margin_slices(shape, grown.shape)
    return WarpField(
        affine=np.asarray(affine, float), disp_ras_mm=grown.disp_ras_mm[inner],
        jacobian=grown.jacobian[inner], outside_valid=grown.outside_valid[inner], mode=grown.mode,
        slice_axis=grown.slice_axis, isocenter_ras_mm=grown.isocenter_ras_mm,
        lattice_mm=grown.lattice_mm, interpolation_error_mm=grown.interpolation_error_mm,
        jacobian_interpolation_error=grown.jacobian_interpolation_error)


def _write_warp(outputs: OutputSet, warp: WarpField, paths: WarpOutputs, summary: dict,
                field: WarpField | None = None) -> None:
    if paths.field:
        field = warp if field is None else field
        write_itk_field(outputs, paths.field, field.disp_ras_mm, field.affine)
    if paths.jacobian:
        write_image(outputs, paths.jacobian, warp.jacobian, warp.affine)
    if paths.magnitude:
        write_image(outputs, paths.magnitude, warp.magnitude_mm.astype(np.float32), warp.affine)
    if paths.mask:
        write_image(outputs, paths.mask, warp.outside_valid.astype(np.uint8), warp.affine)
    if paths.summary:
        outputs.reserve(paths.summary).write_text(json.dumps(summary, indent=2) + "\n")


def _warp_for(image: LoadedImage, coil: CoilModel, frame_spec: FrameSpec, mode: str,
              slice_axis: int | None, margin_mm: float = 0.0, spacing_mm: float | None = None
              ) -> tuple[WarpField, WarpField, DeviceFrame, str]:
    """The warp on the image's grid, and on the grid of the field file.

    With a margin (and the image's spacing) the warp is computed once, on the
    grown grid, and the image's grid takes its interior: the correction then
    uses exactly the numbers written in the field file (what ITK-style tools
    apply). With another spacing the two grids share no nodes and the warp is
    computed on each.
    """
    frame, origin = make_frame(frame_spec)
    if slice_axis is None and mode != "full":
        slice_axis = default_slice_axis(image.affine)
    shape, affine = image.spatial_shape, image.affine
    if margin_mm > 0 or spacing_mm is not None:
        field = compute_warp(coil, *grid_with_margin(shape, affine, margin_mm, spacing_mm), frame, mode=mode,
                             slice_axis=slice_axis)
        warp = (_interior(field, shape, affine) if spacing_mm is None
                else compute_warp(coil, shape, affine, frame, mode=mode, slice_axis=slice_axis))
    else:
        warp = field = compute_warp(coil, shape, affine, frame, mode=mode, slice_axis=slice_axis)
    _warn_outside(warp, image.path)
    if warp.mode == "full" and 1 in image.spatial_shape:
        log.warning("%s: single-slice axis: the through-plane part of the displacement cannot "
                    "be resampled and is left uncorrected", image.path)
    return warp, field, frame, origin


#: Image voxels drawn to measure how far the field file, read trilinearly,
#: is from the warp used on the image.
FIELD_CHECK_VOXELS = 20000


def field_grid_summary(field: WarpField, warp: WarpField, margin_mm: float, seed: int = 0) -> dict:
    """The field file's grid, and its largest deviation from the image's warp.

    The deviation is measured at :data:`FIELD_CHECK_VOXELS` image voxels drawn
    at random (all of them if fewer): the field sampled there trilinearly, as
    ITK's ``DisplacementFieldTransform`` reads it, minus the warp the image
    was corrected with; 0 (up to rounding) when the image's grid is part of
    the field's.
    """
    n = int(np.prod(warp.shape))
    picks = np.random.default_rng(seed).choice(n, min(n, FIELD_CHECK_VOXELS), replace=False)
    ijk = np.stack(np.unravel_index(picks, warp.shape), -1)
    read, _ = sample_field(FieldStep(field.disp_ras_mm, field.affine), index_to_ras(warp.affine, ijk))
    exact = np.asarray(warp.disp_ras_mm)[tuple(ijk.T)]
    return {"shape": [int(v) for v in field.shape],
            "spacing_mm": [float(v) for v in np.linalg.norm(field.affine[:3, :3], axis=0)],
            "margin_mm": float(margin_mm),
            "deviation_max_mm": float(np.abs(read - exact).max()) if n else 0.0}


def _margin(outputs: WarpOutputs | None) -> float:
    """The field file's margin, if a field file is asked for."""
    return float(outputs.field_margin_mm) if outputs is not None and outputs.field else 0.0


def _spacing(outputs: WarpOutputs | None) -> float | None:
    """The field file's voxel size, if a field file is asked for with one."""
    return outputs.field_spacing_mm if outputs is not None and outputs.field else None


def _summary_with_field(warp: WarpField, field: WarpField, outputs: WarpOutputs | None, coil: CoilModel,
                        coil_path: str | Path | None, frame: DeviceFrame, frame_origin: str) -> dict:
    """:func:`warp_summary`, with ``field_grid`` if a composable field is written."""
    summary = warp_summary(warp, coil, coil_path, frame, frame_origin)
    if outputs is not None and outputs.field:
        summary["field_grid"] = field_grid_summary(field, warp, _margin(outputs))
    return summary


def warp_file(reference: str | Path, coil: CoilModel | str | Path, outputs: WarpOutputs, *,
              frame: FrameSpec | None = None, mode: str = "full",
              slice_axis: int | None = None) -> dict:
    """Compute the warp on a reference image's grid and write its products.

    Returns
    -------
    dict
        The summary (also written to ``outputs.summary`` if given).
    """
    image = load_image(reference)
    model, coil_path = _load_coil_any(coil)
    warp, field, dev_frame, origin = _warp_for(image, model, frame or FrameSpec(), mode, slice_axis,
                                               _margin(outputs), _spacing(outputs))
    summary = _summary_with_field(warp, field, outputs, model, coil_path, dev_frame, origin)
    with OutputSet() as out:
        _write_warp(out, warp, outputs, summary, field)
    return summary


def correct_file(
    source: str | Path,
    coil: CoilModel | str | Path,
    corrected: str | Path,
    *,
    warp_outputs: WarpOutputs | None = None,
    frame: FrameSpec | None = None,
    mode: str = "full",
    slice_axis: int | None = None,
    order: int = 3,
    jacobian: bool = True,
    fill: float = 0.0,
    keep_dtype: bool = False,
    progress: Callable[[int, int], None] | None = None,
) -> dict:
    """Correct an image file and write the corrected image (and warp products).

    Returns
    -------
    dict
        The warp summary, with the correction's parameters added.
    """
    image = load_image(source)
    # nibabel has applied any scl_slope/scl_inter: integers here are true values.
    data = image.data
    if not (np.issubdtype(data.dtype, np.number) and data.dtype != np.bool_):
        raise InputError(image.path, f"header field datatype: cannot resample {data.dtype} data")
    model, coil_path = _load_coil_any(coil)
    warp, field, dev_frame, origin = _warp_for(image, model, frame or FrameSpec(), mode, slice_axis,
                                               _margin(warp_outputs), _spacing(warp_outputs))
    if np.issubdtype(data.dtype, np.integer) and not keep_dtype:
        data = data.astype(np.float32)
    result = correct_image(data, image.affine, warp, order=order, jacobian=jacobian, fill=fill,
                           keep_dtype=keep_dtype, progress=progress)
    summary = _summary_with_field(warp, field, warp_outputs, model, coil_path, dev_frame, origin)
    summary["correction"] = {"order": order, "jacobian": jacobian, "fill": fill,
                             "keep_dtype": keep_dtype, "volumes": int(np.prod(data.shape[3:]))}
    with OutputSet() as out:
        write_image(out, corrected, result, image.affine, header=image.header)
        if warp_outputs is not None:
            _write_warp(out, warp, warp_outputs, summary, field)
    return summary
