"""Synthetic grid-and-spheres phantom and forward simulation of distortion.

The phantom is a uniform sphere with small bright spherical markers on a cubic
lattice; edges are smooth (error-function profile, about one voxel wide) so that
the object is nearly band-limited and interpolation does not dominate the
checks. Forward simulation makes the image a linear-gradient reconstruction
would give: at encoded position ``p = u(r)`` it holds ``f(r) / det J(r)``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy.spatial import cKDTree
from scipy.special import erf

from .frames import DeviceFrame
from .warp import index_to_ras, lattice, upsample_lattice

__all__ = ["MarkerPhantom", "Phantom", "forward_simulate", "marker_centroids", "region_means"]


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


@dataclass
class MarkerPhantom:
    """A uniform body with spherical markers anywhere, placed in world by a rigid pose.

    Parameters
    ----------
    markers_mm : (M, 3) array-like
        Marker centres in the phantom frame, mm.
    marker_diameters_mm : (M,) array-like or float
        Marker diameters, mm.
    body_shape : {"sphere", "cylinder"}
        Body about the phantom frame's origin; a cylinder's axis is the frame's z.
    body_radius_mm : float
    body_length_mm : float
        Length of a cylinder along z (ignored for a sphere).
    rotation : (3, 3) array-like
        Phantom frame -> world RAS rotation ``R``.
    translation_ras_mm : (3,) array-like
        World RAS of the phantom frame's origin ``t``: ``p = R q + t``.
    edge_mm, body_value, marker_value : float
        As in :class:`Phantom`. Markers must not overlap (each point sees only
        its nearest marker).
    """

    markers_mm: np.ndarray
    marker_diameters_mm: np.ndarray | float
    body_shape: str = "sphere"
    body_radius_mm: float = 140.0
    body_length_mm: float = 280.0
    rotation: np.ndarray = field(default_factory=lambda: np.eye(3))
    translation_ras_mm: np.ndarray = field(default_factory=lambda: np.zeros(3))
    edge_mm: float = 1.0
    body_value: float = 1.0
    marker_value: float = 2.0

    def __post_init__(self) -> None:
        self.markers_mm = np.asarray(self.markers_mm, float).reshape(-1, 3)
        self.marker_diameters_mm = np.broadcast_to(np.asarray(self.marker_diameters_mm, float),
                                                   (len(self.markers_mm),)).copy()
        self.rotation = np.asarray(self.rotation, float)
        self.translation_ras_mm = np.asarray(self.translation_ras_mm, float)
        if self.body_shape not in ("sphere", "cylinder"):
            raise ValueError(f"body shape must be sphere or cylinder, got {self.body_shape!r}")
        self._tree = cKDTree(self.markers_mm)

    def markers_ras_mm(self) -> np.ndarray:
        """(M, 3) marker centres in world RAS, mm."""
        return self.markers_mm @ self.rotation.T + self.translation_ras_mm

    def _step(self, distance_mm: np.ndarray) -> np.ndarray:
        return 0.5 * (1.0 - erf(distance_mm / self.edge_mm))

    def intensity(self, points_ras_mm: np.ndarray) -> np.ndarray:
        """Phantom intensity at (..., 3) RAS points."""
        pts = np.asarray(points_ras_mm, float)
        shape = pts.shape[:-1]
        q = (pts.reshape(-1, 3) - self.translation_ras_mm) @ self.rotation
        if self.body_shape == "sphere":
            outside = np.linalg.norm(q, axis=1) - self.body_radius_mm
        else:
            outside = np.maximum(np.hypot(q[:, 0], q[:, 1]) - self.body_radius_mm,
                                 np.abs(q[:, 2]) - self.body_length_mm / 2)
        value = self.body_value * self._step(outside)
        # Only points near a marker need the marker term.
        reach = 0.5 * float(self.marker_diameters_mm.max()) + 6.0 * self.edge_mm
        dist, idx = self._tree.query(q, distance_upper_bound=reach)
        near = np.isfinite(dist)
        radius = 0.5 * self.marker_diameters_mm[idx[near]]
        value[near] += self.marker_value * self._step(dist[near] - radius)
        return value.reshape(shape)


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
