"""Slow, obviously-correct sampling references shared by the resampling tests."""

from __future__ import annotations

import numpy as np
from scipy.spatial.transform import Rotation


def reference_coords(raw_affine, out_affine, disp):
    """Raw voxel coordinates (3, X, Y, Z) of p + d(p), p the output voxel centres (RAS)."""
    shape = disp.shape[:3]
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1).astype(float)
    points = ijk @ out_affine[:3, :3].T + out_affine[:3, 3] + disp.astype(float)
    raw_inv = np.linalg.inv(raw_affine)
    return np.moveaxis(points @ raw_inv[:3, :3].T + raw_inv[:3, 3], -1, 0)


def inside_fov(coords, raw_shape):
    """Inside the raw field of view: within half a voxel of the grid on every real axis."""
    ok = np.ones(coords.shape[1:], dtype=bool)
    for axis, n in enumerate(raw_shape):
        if n > 1:
            ok &= (coords[axis] >= -0.5) & (coords[axis] <= n - 0.5)
    return ok


def sitk_points(transform, points_ras):
    """A SimpleITK transform applied to (N, 3) RAS points: ITK maps LPS points, so convert at the
    boundary (CONVENTIONS.md section 1)."""
    lps = np.array([-1.0, -1.0, 1.0])
    return np.array([transform.TransformPoint(tuple(map(float, p * lps))) for p in points_ras]) * lps


def oblique_affine(shape, zooms, euler_deg, centre_mm):
    """Voxel -> RAS affine: rotated (x-y-z Euler, degrees), scaled, centred at ``centre_mm``."""
    rot = Rotation.from_euler("xyz", euler_deg, degrees=True).as_matrix()
    affine = np.eye(4)
    affine[:3, :3] = rot @ np.diag(zooms)
    affine[:3, 3] = np.asarray(centre_mm) - affine[:3, :3] @ ((np.asarray(shape) - 1) / 2)
    return affine
