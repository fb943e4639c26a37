"""Coil model from phantom scans: the file-level entry point and its nipype Interface.

:func:`fit_phantom_files` reads the scans and the phantom definition, detects
and matches the markers, fits (:func:`nl_unwarp.phantom_fit.fit_phantom`) and
writes the coil model file, the per-marker residual table and the report
pages together (complete-or-nothing, :class:`~nl_unwarp.io.atomic.OutputSet`).
"""

from __future__ import annotations

import json
import logging
import os
from collections.abc import Sequence
from pathlib import Path

from nipype.interfaces.base import (
    BaseInterfaceInputSpec,
    File,
    InputMultiObject,
    SimpleInterface,
    TraitedSpec,
    traits,
)

from ._utils import one_blas_thread, optional

__all__ = ["FitPhantom", "fit_phantom_files"]

log = logging.getLogger("nl_unwarp")

#: Name of the phantom-fit page inside the report folder.
REPORT_PAGE = "phantom_fit.html"
#: A scan matching fewer than this fraction of the definition's markers, or a fit
#: flagging more than this fraction as outliers, is warned about.
MATCHED_WARN_FRACTION = 0.8
OUTLIER_WARN_FRACTION = 0.05


def _scan_frames(images: Sequence, position: str, table_positions, isocenter_offsets):
    """One FrameSpec per scan: per-scan table positions / offsets, or one for all."""
    from ..api import FrameSpec
    from ..errors import InputError

    def per_scan(values, name):
        if values is None:
            return [None] * len(images)
        values = list(values)
        if len(values) == 1:
            return values * len(images)
        if len(values) != len(images):
            raise InputError(name, f"{len(values)} given for {len(images)} images: give one, or one per "
                                   "image in the same order")
        return values

    tps = per_scan(table_positions, "--table-position")
    isos = per_scan(isocenter_offsets, "--isocenter-offset")
    return [FrameSpec(position, None if tp is None else tuple(tp), None if iso is None else tuple(iso))
            for tp, iso in zip(tps, isos, strict=True)]


def fit_phantom_files(
    images: Sequence[str | os.PathLike],
    phantom: str | os.PathLike,
    out_coil: str | os.PathLike,
    *,
    degree: int,
    position: str = "HFS",
    table_positions=None,
    isocenter_offsets=None,
    symmetry: str = "none",
    fit_isocenter_offset: bool = False,
    loss: str | None = None,
    loss_scale_mm: float | None = None,
    report_dir: str | os.PathLike | None = None,
    markers_tsv: str | os.PathLike | None = None,
    label: str | None = None,
    date: str | None = None,
    phantom_rotation_deg=None,
    out_summary: str | os.PathLike | None = None,
    step=None,
) -> dict:
    """Build a coil model file from phantom scans.

    Parameters
    ----------
    images : sequence of path
        3-D NIfTI scans of the phantom (the first volume of a 4-D file is used).
    phantom : path
        Phantom definition file (``docs/phantom-format.md``).
    out_coil : path
        Coil model file to write.
    degree : int
        Highest harmonic degree fitted.
    position : str
        DICOM PatientPosition of the phantom (the same in every scan).
    table_positions, isocenter_offsets : sequence of 3-sequences, optional
        One for all scans or one per scan (BIDS TablePosition; device offsets).
    symmetry, fit_isocenter_offset, loss, loss_scale_mm
        As in :func:`nl_unwarp.phantom_fit.fit_phantom`.
    report_dir : path, optional
        Folder for the report page (``phantom_fit.html``) and the coil model's page.
    markers_tsv : path, optional
        Per-marker residual table to write.
    label, date : str, optional
        Label and date of the coil model.
    phantom_rotation_deg : 3 floats, optional
        Rough rotation of the phantom frame in world RAS, as rotations about
        the world x, y, z axes in that order (extrinsic, degrees); matching tries
        the 24 axis-aligned orientations about it (default: none). Matching
        starts within a few degrees of the truth or not at all.
    out_summary : path, optional
        Where to write the returned summary as JSON.
    step : callable, optional
        Progress messages.

    Returns
    -------
    dict
        JSON-ready summary: scans, fit figures, pose, outputs.
    """
    import numpy as np

    from ..api import make_frame
    from ..errors import InputError
    from ..io.atomic import OutputSet
    from ..io.coilfile import coil_sha256, coil_text
    from ..io.nifti import load_image
    from ..io.phantomdef import load_phantom_definition, write_marker_table
    from ..markers import detect_markers, match_any_orientation
    from ..phantom_fit import DEFAULT_LOSS, MAX_DEGREE, PhantomScan, fit_phantom
    from ..report.pages import coil_page_name, render_coil_page
    from ..report.phantompage import render_phantom_page

    say = step or (lambda message: None)
    if not images:
        raise InputError("images", "give at least one phantom scan")
    if not 2 <= int(degree) <= MAX_DEGREE:
        raise InputError("--degree", f"a phantom fit takes degree 2 to {MAX_DEGREE}, got {degree}")
    if fit_isocenter_offset and symmetry == "none":
        raise InputError("--fit-isocenter-offset", "needs --symmetry mirror or axial: without a symmetry "
                                                   "the isocenter offset is not determined by the scans")
    definition = load_phantom_definition(phantom)
    base_rotation = None
    if phantom_rotation_deg is not None:
        from scipy.spatial.transform import Rotation

        angles = np.asarray(phantom_rotation_deg, dtype=float).reshape(-1)
        if angles.shape != (3,) or not np.all(np.isfinite(angles)):
            raise InputError("--phantom-rotation", f"give three finite angles in degrees, got "
                                                   f"{phantom_rotation_deg!r}")
        base_rotation = Rotation.from_euler("xyz", angles, degrees=True).as_matrix()
    frames = [make_frame(spec)[0] for spec in _scan_frames(images, position, table_positions,
                                                           isocenter_offsets)]
    scans, scan_info = [], []
    for path, frame in zip(images, frames, strict=True):
        image = load_image(path)
        data = image.data if image.data.ndim == 3 else image.data[..., 0]
        say(f"detecting markers in {path}")
        found = detect_markers(np.asarray(data, dtype=np.float32), image.affine,
                               marker_diameter_mm=definition.typical_diameter_mm,
                               largest_diameter_mm=float(definition.diameters_mm.max()),
                               expected_count=len(definition.ids))
        try:
            match = match_any_orientation(definition.markers_mm, found.centroids_ras_mm,
                                          base_rotation=base_rotation)
        except ValueError as exc:
            raise InputError(str(path), f"markers: {exc}") from None
        label_s = Path(path).name
        if len(match.marker_index) < MATCHED_WARN_FRACTION * len(definition.ids):
            log.warning("%s: only %d of the phantom's %d markers matched; check the definition, the "
                        "scan's contrast and --phantom-rotation", path, len(match.marker_index),
                        len(definition.ids))
        scans.append(PhantomScan(definition.markers_mm[match.marker_index],
                                 found.centroids_ras_mm[match.detection_index], frame,
                                 match.marker_index, label_s))
        scan_info.append({"label": label_s, "detected": len(found.centroids_ras_mm),
                          "matched": len(match.marker_index), "missing": match.unmatched_markers,
                          "spurious": match.unmatched_detections,
                          "rejected_blobs": int(sum(found.rejected.values())),
                          "noise_sigma": found.noise_sigma})
    say(f"fitting pose and coil terms to degree {degree} ({sum(len(s.marker_index) for s in scans)} "
        f"markers, {len(scans)} scan(s))")
    try:
        with one_blas_thread():
            fit = fit_phantom(scans, degree=degree, symmetry=symmetry,
                              fit_isocenter_offset=fit_isocenter_offset, loss=loss or DEFAULT_LOSS,
                              loss_scale_mm=loss_scale_mm,
                              label=label or f"phantom fit ({definition.name})")
    except ValueError as exc:
        raise InputError(str(phantom), f"fit: {exc}") from None
    markers = sum(len(s.marker_index) for s in scans)
    fit.coil.source = {
        "kind": "fit", "method": "phantom", "samples": int(markers), "degree": int(degree),
        "residual_rms_mm": round(fit.residual_rms_mm, 6), "residual_max_mm": round(fit.residual_max_mm, 6),
        "description": (f"joint fit of the pose of phantom '{definition.name}' and the coil terms of "
                        f"degree 2..{degree} to {markers} matched markers in {len(scans)} scan(s); "
                        f"residual rms {fit.residual_rms_mm:.3g} mm, max {fit.residual_max_mm:.3g} mm"),
    }
    if date:
        fit.coil.source["date"] = date
    for info, row in zip(scan_info, fit.scans, strict=True):
        info.update(residual_rms_mm=row["residual_rms_mm"], isocenter_offset_mm=row["isocenter_offset_mm"])
    with OutputSet() as out:
        tmp_coil = out.reserve(out_coil)
        tmp_coil.write_text(coil_text(fit.coil), encoding="utf-8")
        sha = coil_sha256(tmp_coil)
        if markers_tsv is not None:
            write_marker_table(out, markers_tsv, fit.markers, definition.ids)
        if report_dir is not None:
            say(f"writing the report in {report_dir}")
            coil_name = coil_page_name(sha)
            delta = np.zeros(3) if fit.isocenter_correction_mm is None else fit.isocenter_correction_mm
            dev = np.concatenate([s.frame.to_device(fit.pose.apply(s.definition_mm)) + delta for s in scans])
            html = render_phantom_page(fit, phantom_name=definition.name, scans=scan_info, coil_sha256=sha,
                                       radius_device_mm=np.linalg.norm(dev, axis=1), ids=definition.ids,
                                       coil_href=coil_name)
            out.reserve(Path(report_dir) / REPORT_PAGE).write_text(html, encoding="utf-8")
            out.reserve(Path(report_dir) / coil_name).write_text(render_coil_page(fit.coil, sha),
                                                                 encoding="utf-8")
        summary = {
            "phantom": definition.name, "scans": scan_info, "degree": int(degree), "symmetry": symmetry,
            "markers": int(markers), "residual_rms_mm": fit.residual_rms_mm,
            "residual_max_mm": fit.residual_max_mm, "rigid_residual_rms_mm": fit.rigid_residual_rms_mm,
            "outliers": int(sum(m["outlier"] for m in fit.markers)),
            "pose": {"rotation": fit.pose.rotation.tolist(),
                     "translation_ras_mm": fit.pose.translation_ras_mm.tolist(),
                     "rotation_angle_deg": fit.pose.rotation_angle_deg(),
                     "rotation_sigma_deg": fit.pose_sigma["rotation_deg"].tolist(),
                     "translation_sigma_mm": fit.pose_sigma["translation_mm"].tolist()},
            "isocenter_correction_mm": None if fit.isocenter_correction_mm is None
            else fit.isocenter_correction_mm.tolist(),
            "isocenter_correction_sigma_mm": None if fit.isocenter_correction_sigma_mm is None
            else fit.isocenter_correction_sigma_mm.tolist(),
            "valid_radius_mm": fit.coil.valid_radius_mm, "coil_sha256": sha, "coil": str(out_coil),
            "report": None if report_dir is None else str(Path(report_dir) / REPORT_PAGE),
            "markers_tsv": None if markers_tsv is None else str(markers_tsv),
        }
        if out_summary is not None:
            out.reserve(out_summary).write_text(json.dumps(summary, indent=2) + "\n", encoding="utf-8")
    outliers = sum(m["outlier"] for m in fit.markers)
    if outliers > OUTLIER_WARN_FRACTION * len(fit.markers):
        log.warning("%d of %d markers are outliers of the fit (see the residual table)", outliers,
                    len(fit.markers))
    if fit.isocenter_correction_mm is not None:
        worst = float(np.max(fit.isocenter_correction_sigma_mm))
        if worst > 1.0:
            log.warning("the isocenter correction is poorly determined (standard error %.2g mm)", worst)
    return summary


class _FitPhantomInputSpec(BaseInterfaceInputSpec):
    in_files = InputMultiObject(File(exists=True), mandatory=True, desc="3-D phantom scans (NIfTI)")
    phantom = File(exists=True, mandatory=True, desc="phantom definition file (nl_unwarp-phantom JSON)")
    degree = traits.Range(low=2, high=9, value=7, usedefault=True, desc="highest harmonic degree")
    position = traits.Str("HFS", usedefault=True, desc="DICOM PatientPosition")
    table_positions = traits.List(traits.List(traits.Float, minlen=3, maxlen=3),
                                  desc="BIDS TablePosition per scan (or one for all), mm")
    isocenter_offsets = traits.List(traits.List(traits.Float, minlen=3, maxlen=3),
                                    desc="isocenter offset per scan (or one for all), device mm")
    symmetry = traits.Enum("none", "mirror", usedefault=True, desc="impose the mirror symmetry of the design")
    fit_isocenter_offset = traits.Bool(False, usedefault=True,
                                       desc="also fit a common isocenter correction (needs mirror symmetry)")
    loss_scale_mm = traits.Float(desc="residual scale of the robust loss, mm (default: from a first fit)")
    label = traits.Str(desc="label of the coil model")
    phantom_rotation_deg = traits.List(traits.Float, minlen=3, maxlen=3,
                                       desc="rough phantom rotation about world x, y, z (degrees)")
    report = traits.Bool(True, usedefault=True, desc="write the report pages")


class _FitPhantomOutputSpec(TraitedSpec):
    out_coil = File(exists=True, desc="the fitted coil model file")
    out_markers = File(exists=True, desc="per-marker residual table (TSV)")
    out_report = File(desc="the phantom-fit report page (HTML)")
    summary = traits.Dict(desc="fit summary")


class FitPhantom(SimpleInterface):
    """Fit a coil model to phantom scans.

    Calls :func:`fit_phantom_files`; writes ``coil.json``, ``markers.tsv`` and
    (unless ``report`` is off) ``report/phantom_fit.html`` in the node's folder.

    Examples
    --------
    >>> node = FitPhantom(degree=7)
    >>> node.inputs.in_files = ["phantom_scan.nii.gz"]  # doctest: +SKIP
    >>> node.inputs.phantom = "phantom.json"  # doctest: +SKIP
    >>> node.run().outputs.out_coil  # doctest: +SKIP
    '.../coil.json'
    """

    input_spec = _FitPhantomInputSpec
    output_spec = _FitPhantomOutputSpec

    def _run_interface(self, runtime):
        coil = os.path.join(runtime.cwd, "coil.json")
        tsv = os.path.join(runtime.cwd, "markers.tsv")
        report = os.path.join(runtime.cwd, "report") if self.inputs.report else None
        summary = fit_phantom_files(
            list(self.inputs.in_files), self.inputs.phantom, coil, degree=self.inputs.degree,
            position=self.inputs.position, table_positions=optional(self.inputs, "table_positions"),
            isocenter_offsets=optional(self.inputs, "isocenter_offsets"), symmetry=self.inputs.symmetry,
            fit_isocenter_offset=self.inputs.fit_isocenter_offset,
            loss_scale_mm=optional(self.inputs, "loss_scale_mm"), report_dir=report, markers_tsv=tsv,
            label=optional(self.inputs, "label"),
            phantom_rotation_deg=optional(self.inputs, "phantom_rotation_deg"))
        self._results.update(out_coil=coil, out_markers=tsv, summary=summary)
        if report is not None:
            self._results["out_report"] = summary["report"]
        return runtime
