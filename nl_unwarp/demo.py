"""The embedded demo: a fictional gradient system, a phantom, distortion and correction.

Everything here is invented: the gradient system ``NLU-Demo Meridian 45`` is not
any real scanner, and the phantom is synthetic.
"""

from __future__ import annotations

from collections.abc import Callable
from importlib import resources
from pathlib import Path

import numpy as np

from .api import FrameSpec, WarpOutputs, correct_file
from .frames import DeviceFrame
from .io.atomic import OutputSet
from .io.coilfile import load_coil
from .io.nifti import write_image
from .phantom import Phantom, forward_simulate, marker_centroids, region_means
from .warp import index_to_ras

__all__ = ["DEMO_COIL", "demo_coil_path", "run_demo"]

DEMO_COIL = "demo_coil.json"
#: Demo grid: 2 mm isotropic, 128^3 (256 mm field of view), centred on the isocenter.
DEMO_SHAPE = (128, 128, 128)
DEMO_VOXEL_MM = 2.0
#: Uniformity probes: 5 mm balls between markers, 80-100 mm from the centre.
PROBE_CENTRES_MM = np.array([
    [15, 15, 75], [15, 15, -75], [75, 15, 15], [-75, 15, 15], [15, 75, 15], [15, -75, 15],
    [45, 45, 45], [-45, -45, -45], [45, -45, 75], [-75, 45, -15],
], dtype=float)


def demo_coil_path() -> Path:
    """Path of the fictional demo coil model shipped in the package."""
    return Path(str(resources.files("nl_unwarp") / "data" / DEMO_COIL))


def demo_phantom() -> Phantom:
    """The grid-and-spheres phantom of the demo."""
    return Phantom(radius_mm=115.0, marker_spacing_mm=30.0, marker_radius_mm=4.0,
                   marker_extent_mm=105.0, edge_mm=1.5)


def demo_affine() -> np.ndarray:
    affine = np.diag([DEMO_VOXEL_MM] * 3 + [1.0])
    affine[:3, 3] = -DEMO_VOXEL_MM * (np.array(DEMO_SHAPE) - 1) / 2
    return affine


def _quality(image, affine, phantom) -> dict:
    markers = phantom.markers_ras_mm()
    found = marker_centroids(image, affine, markers, window_mm=8.0, background=phantom.body_value)
    err = np.linalg.norm(found - markers, axis=1)
    probes = region_means(image, affine, PROBE_CENTRES_MM, radius_mm=5.0) / phantom.body_value
    return {"marker_error_max_mm": float(np.nanmax(err)), "marker_error_mean_mm": float(np.nanmean(err)),
            "uniformity_max_deviation": float(np.max(np.abs(probes - 1.0)))}


def run_demo(outdir: str | Path, *, step: Callable[[str], None] | None = None) -> dict:
    """Distort the phantom with the demo coil, correct it, and measure both.

    Parameters
    ----------
    outdir : str or Path
        Folder for ``phantom_truth``, ``phantom_raw`` (distorted),
        ``phantom_corrected`` images, the ITK field, Jacobian and
        displacement-magnitude maps, and ``summary.json``.
    step : callable, optional
        Called with a short description before each step (progress).

    Returns
    -------
    dict
        ``warp`` (the correction summary), ``before`` and ``after`` quality
        figures (marker error, intensity uniformity).
    """
    say = step or (lambda _msg: None)
    outdir = Path(outdir)
    coil = load_coil(demo_coil_path())
    phantom, affine = demo_phantom(), demo_affine()
    frame = DeviceFrame("HFS")
    say("simulating the distorted phantom scan")
    raw = forward_simulate(phantom, lambda r: coil.encode(r, jacobian=False)[0],
                           DEMO_SHAPE, affine, frame).astype(np.float32)
    truth = phantom.intensity(index_to_ras(affine, np.stack(
        np.meshgrid(*[np.arange(n) for n in DEMO_SHAPE], indexing="ij"), -1).astype(float)))
    with OutputSet() as out:
        write_image(out, outdir / "phantom_truth.nii.gz", truth.astype(np.float32), affine)
        write_image(out, outdir / "phantom_raw.nii.gz", raw, affine)
    say("correcting")
    summary = correct_file(
        outdir / "phantom_raw.nii.gz", demo_coil_path(), outdir / "phantom_corrected.nii.gz",
        warp_outputs=WarpOutputs(field=outdir / "phantom_field.nii.gz",
                                 jacobian=outdir / "phantom_jacobian.nii.gz",
                                 magnitude=outdir / "phantom_displacement.nii.gz",
                                 summary=outdir / "summary.json"),
        frame=FrameSpec("HFS", isocenter_offset_mm=(0.0, 0.0, 0.0)),
    )
    import nibabel as nib

    corrected = np.asarray(nib.load(str(outdir / "phantom_corrected.nii.gz")).dataobj)
    say("measuring")
    return {"warp": summary, "before": _quality(raw, affine, phantom),
            "after": _quality(corrected, affine, phantom)}
