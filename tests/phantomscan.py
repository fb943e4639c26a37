"""Simulated phantom scans for the phantom-fit tests: Biot-Savart truth, forward distortion, noise.

The truth is the Biot-Savart coil set of ``tests/coils.py`` (magpylib), not our
harmonic model. Its encoding is tabulated once per process (``LatticeEncoder``,
cached) and a phantom with markers anywhere (``nl_unwarp.phantom.MarkerPhantom``)
is forward-simulated through it (``nl_unwarp.phantom.forward_simulate``); noise
comes from a seeded generator.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from coils import LatticeEncoder, coil_set, encode_direct

from nl_unwarp.frames import DeviceFrame
from nl_unwarp.phantom import MarkerPhantom, forward_simulate

#: Beyond this distance from the isocenter the simulated encoding is the identity: no
#: phantom has signal there, and near the wires (0.35 m) the inverse encoding's
#: fixed-point iteration would not converge. It must exceed every phantom's reach
#: plus its displacement (a few mm) and the lattice's interpolation support.
IDENTITY_BEYOND_MM = 190.0
#: Half-width and step of the Biot-Savart lattice, mm (quintic splines: error
#: ~1e-3 mm at 20 mm, measured by ``LatticeEncoder.error_mm`` in test_phantom_fit).
LATTICE_HALF_MM = 215.0
LATTICE_STEP_MM = 20.0


@lru_cache(maxsize=1)
def truth_coils():
    """The Biot-Savart coil set (built once per test process)."""
    return coil_set()


@lru_cache(maxsize=1)
def biot_savart():
    """The coil set and its tabulated encoding (built once per test process)."""
    coils = truth_coils()
    lattice = LatticeEncoder(coils, [-LATTICE_HALF_MM] * 3, [LATTICE_HALF_MM] * 3, LATTICE_STEP_MM)
    return coils, lattice


def encoder(points_device_mm: np.ndarray) -> np.ndarray:
    """Biot-Savart encoded positions (mm), identity beyond :data:`IDENTITY_BEYOND_MM`."""
    _, lattice = biot_savart()
    pts = np.asarray(points_device_mm, float)
    out = pts.copy()
    inside = np.linalg.norm(pts, axis=-1) < IDENTITY_BEYOND_MM
    out[inside] = lattice(pts[inside])
    return out


def true_displacement_mm(points_device_mm: np.ndarray) -> np.ndarray:
    """Biot-Savart displacement u(r) - r (mm), directly (no lattice)."""
    pts = np.asarray(points_device_mm, float)
    return encode_direct(truth_coils(), pts) - pts


def lattice_phantom(spacing_mm: float, extent_mm: float, *, diameter_mm: float = 6.0):
    """Markers on a cubic lattice within ``extent_mm`` plus three larger orientation markers."""
    half = int(extent_mm // spacing_mm)
    ticks = np.arange(-half, half + 1) * spacing_mm
    grid = np.stack(np.meshgrid(ticks, ticks, ticks, indexing="ij"), -1).reshape(-1, 3)
    grid = grid[np.linalg.norm(grid, axis=1) <= extent_mm + 1e-9]
    s = spacing_mm
    # Cell centres (far from every lattice marker) at three different distances from the
    # origin: only the identity maps the set onto itself.
    extra = s * np.array([[0.5, 0.5, 0.5], [1.5, 0.5, 0.5], [0.5, 0.5, 2.5]])
    markers = np.concatenate([grid, extra])
    diameters = np.r_[np.full(len(grid), diameter_mm), np.full(3, diameter_mm + 2.0)]
    return markers, diameters


def simulate_scan(markers_mm, diameters_mm, *, body_radius_mm: float, rotation, translation_ras_mm,
                  frame: DeviceFrame, voxel_mm: float, fov_mm: float, noise_sigma: float, seed: int,
                  edge_mm: float = 1.5):
    """A noisy, Biot-Savart-distorted scan of the phantom on an axis-aligned grid about it.

    Returns ``(image, affine, phantom)``.
    """
    phantom = MarkerPhantom(markers_mm, diameters_mm, body_radius_mm=body_radius_mm, rotation=rotation,
                            translation_ras_mm=translation_ras_mm, edge_mm=edge_mm)
    n = int(round(fov_mm / voxel_mm))
    affine = np.diag([voxel_mm, voxel_mm, voxel_mm, 1.0])
    affine[:3, 3] = np.asarray(translation_ras_mm, float) - voxel_mm * (n - 1) / 2
    image = forward_simulate(phantom, encoder, (n, n, n), affine, frame)
    image += np.random.default_rng(seed).normal(0.0, noise_sigma, image.shape)
    return image.astype(np.float32), affine, phantom


def ball_points(rng: np.random.Generator, count: int, radius_mm: float) -> np.ndarray:
    """Uniform random points in a ball about the origin."""
    v = rng.normal(size=(count, 3))
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    return v * radius_mm * rng.uniform(0, 1, (count, 1)) ** (1 / 3)
