"""Synthetic grid-and-spheres phantom and forward simulation of distortion.

The phantom is a uniform sphere with small bright spherical markers on a cubic
lattice; edges are smooth (error-function profile, about one voxel wide) so that
the object is nearly band-limited and interpolation does not dominate the
checks. Forward simulation makes the image a linear-gradient reconstruction
would give: at encoded position ``p = u(r)`` it holds ``f(r) / det J(r)``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.special import erf

from .frames import DeviceFrame
from .warp import index_to_ras, lattice, upsample_lattice

__all__ = ["Phantom", "forward_simulate", "marker_centroids", "region_means"]


@dataclass
class Phantom:
    """Uniform sphere with markers, defined in world RAS mm.

    Parameters
    ----------
    center_ras_mm : (3,) array-like
    radius_mm : float
        Radius of the uniform body.
    marker_spacing_mm, marker_radius_mm : float
        Lattice spacing and radius of the markers.
    marker_extent_mm : float
        Markers lie within this distance of the center.
    edge_mm : float
        Width of the smooth edges.
    body_value, marker_value : float
        Intensities of the body and the markers' excess over it.
    """

    center_ras_mm: tuple = (0.0, 0.0, 0.0)
    radius_mm: float = 100.0
    marker_spacing_mm: float = 30.0
    marker_radius_mm: float = 3.0
    marker_extent_mm: float = 80.0
    edge_mm: float = 1.0
    body_value: float = 1.0
    marker_value: float = 2.0

    def markers_ras_mm(self) -> np.ndarray:
        """(M, 3) marker centres, RAS mm."""
        half = int(self.marker_extent_mm // self.marker_spacing_mm)
        ticks = np.arange(-half, half + 1) * self.marker_spacing_mm
        grid = np.stack(np.meshgrid(ticks, ticks, ticks, indexing="ij"), -1).reshape(-1, 3)
        keep = np.linalg.norm(grid, axis=1) <= self.marker_extent_mm
        return grid[keep] + np.asarray(self.center_ras_mm, float)

    def _step(self, distance_mm: np.ndarray, radius_mm: float) -> np.ndarray:
        return 0.5 * (1.0 - erf((distance_mm - radius_mm) / self.edge_mm))

    def intensity(self, points_ras_mm: np.ndarray) -> np.ndarray:
        """Phantom intensity at (..., 3) RAS points."""
        pts = np.asarray(points_ras_mm, float)
        rel = pts - np.asarray(self.center_ras_mm, float)
        value = self.body_value * self._step(np.linalg.norm(rel, axis=-1), self.radius_mm)
        spacing = self.marker_spacing_mm
        # Nearest lattice marker only: markers are far apart compared with their size.
        nearest = np.round(rel / spacing) * spacing
        in_set = np.linalg.norm(nearest, axis=-1) <= self.marker_extent_mm + 1e-9
        dist = np.linalg.norm(rel - nearest, axis=-1)
        value += np.where(in_set, self.marker_value * self._step(dist, self.marker_radius_mm), 0.0)
        return value


def forward_simulate(
    phantom: Phantom,
    encode_device: Callable[[np.ndarray], np.ndarray],
    shape: tuple[int, int, int],
    affine: np.ndarray,
    frame: DeviceFrame,
    *,
    lattice_mm: float = 6.0,
    iterations: int = 8,
) -> np.ndarray:
    """Image of the phantom as a linear-gradient reconstruction makes it.

    Parameters
    ----------
    phantom : Phantom
    encode_device : callable
        True device positions (N, 3) mm -> encoded device positions (N, 3) mm:
        the physical truth (a coil model, or a Biot-Savart field / gradient).
    shape, affine : grid of the raw image (voxel -> RAS mm).
    frame : DeviceFrame
    lattice_mm : float
        The encoding is inverted exactly at the nodes of a lattice aligned with
        the grid (see :func:`nl_unwarp.warp.lattice`) and upsampled.
    iterations : int
        Fixed-point iterations of ``r = p - d(r)`` that invert the encoding
        (they converge as ``|grad d|^k``, a few per cent per step).

    Returns
    -------
    (X, Y, Z) float64 ndarray
        ``f(r) / det J(r) = f(r) det(dr/dp)`` at each raw voxel ``p = u(r)``.
    """
    affine = np.asarray(affine, dtype=float)
    zooms = np.linalg.norm(affine[:3, :3], axis=0)
    steps, nodes = lattice(shape, zooms, lattice_mm)
    ijk = np.stack(np.meshgrid(*nodes, indexing="ij"), -1).astype(float)
    p_dev = frame.to_device(index_to_ras(affine, ijk))
    r_dev = p_dev.copy()
    for _ in range(iterations):
        r_dev = p_dev - (encode_device(r_dev.reshape(-1, 3)).reshape(r_dev.shape) - r_dev)
    # det(dr/dp): lattice differences in index space, divided by det of the
    # affine (the device rotation has det +1).
    grads = [np.gradient(r_dev[..., c], *[float(s) for s in steps], edge_order=2) for c in range(3)]
    det = np.linalg.det(np.stack([np.stack(g, -1) for g in grads], -2)) / np.linalg.det(affine[:3, :3])
    full = upsample_lattice(np.concatenate([r_dev, det[..., None]], -1), shape, steps)
    r_ras = frame.to_ras(full[..., :3].astype(float))
    return phantom.intensity(r_ras) * full[..., 3]


def marker_centroids(image: np.ndarray, affine: np.ndarray, expected_ras_mm: np.ndarray,
                     *, window_mm: float, background: float) -> np.ndarray:
    """Intensity centroids (RAS mm) of markers near their expected positions.

    Parameters
    ----------
    image : (X, Y, Z) ndarray
    affine : (4, 4) ndarray
    expected_ras_mm : (M, 3) ndarray
        Where to look; each centroid uses the voxels within ``window_mm``.
    window_mm : float
    background : float
        Level subtracted (the body intensity); negative excess is ignored.

    Returns
    -------
    (M, 3) ndarray, RAS mm (NaN where no excess signal was found).
    """
    inv = np.linalg.inv(affine)
    zooms = np.linalg.norm(affine[:3, :3], axis=0)
    half = np.ceil(window_mm / zooms).astype(int)
    out = np.full((len(expected_ras_mm), 3), np.nan)
    for k, centre in enumerate(expected_ras_mm):
        c_idx = np.rint(inv[:3, :3] @ centre + inv[:3, 3]).astype(int)
        lo = np.maximum(c_idx - half, 0)
        hi = np.minimum(c_idx + half + 1, image.shape)
        if np.any(hi <= lo):
            continue
        block = image[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]] - background
        ranges = [np.arange(a, b) for a, b in zip(lo, hi, strict=True)]
        idx = np.stack(np.meshgrid(*ranges, indexing="ij"), -1)
        pts = idx @ affine[:3, :3].T + affine[:3, 3]
        w = np.clip(block, 0.0, None) * (np.linalg.norm(pts - centre, axis=-1) <= window_mm)
        if w.sum() > 0:
            out[k] = (pts * w[..., None]).sum((0, 1, 2)) / w.sum()
    return out


def region_means(image: np.ndarray, affine: np.ndarray, centres_ras_mm: np.ndarray,
                 *, radius_mm: float) -> np.ndarray:
    """Mean intensity inside balls of ``radius_mm`` around each centre (RAS mm)."""
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in image.shape], indexing="ij"), -1)
    pts = ijk @ affine[:3, :3].T + affine[:3, 3]
    means = []
    for centre in centres_ras_mm:
        mask = np.linalg.norm(pts - centre, axis=-1) <= radius_mm
        means.append(float(image[mask].mean()) if mask.any() else np.nan)
    return np.array(means)
