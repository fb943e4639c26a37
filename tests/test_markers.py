"""Marker detection, matching and rigid fits (nl_unwarp.markers).

Outside references:

* rigid fits against ``scipy.spatial.transform.Rotation.align_vectors`` (scipy's own
  Kabsch solution, scipy documentation) on centred point sets;
* sub-voxel centroids against ``scipy.ndimage.center_of_mass`` of the same blob, and
  against the placed centres of an undistorted phantom (the image is the phantom's
  analytic intensity sampled on the grid, with ideal, identity encoding);
* matching against the known correspondence of a simulated scan.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from phantomscan import lattice_phantom
from scipy import ndimage
from scipy.spatial.transform import Rotation

from nl_unwarp.markers import (
    RigidPose,
    detect_markers,
    kabsch,
    match_any_orientation,
    match_markers,
    proper_rotations_24,
    robust_rigid_fit,
)
from nl_unwarp.phantom import MarkerPhantom
from nl_unwarp.warp import index_to_ras

#: Rotations agree with scipy's align_vectors to float64 rounding of an SVD of
#: coordinates ~100 mm (relative 1e-12, with room).
ROTATION_ATOL = 1e-9
#: Centroids of an undistorted, noiseless marker sampled at 2 mm with 1.5 mm edges:
#: sampling (aliasing) bias of a smooth ball, measured below 5e-3 mm; 0.02 mm bound.
CENTROID_TOL_MM = 0.02
#: Robust fit with a fifth of the pairs wrong: the inliers carry 0.05 mm noise, so the
#: pose from them is known to ~0.01 mm / 0.005 deg; the robust fit must match the
#: inlier-only fit to a tenth of a millimetre / degree at the markers.
ROBUST_TOL = 0.02

VOXEL_MM = 2.0
SPACING_MM, EXTENT_MM = 20.0, 60.0


def _image(phantom, fov_mm: float, voxel_mm: float = VOXEL_MM, centre=(0.0, 0.0, 0.0)):
    n = int(round(fov_mm / voxel_mm))
    affine = np.diag([voxel_mm] * 3 + [1.0])
    affine[:3, 3] = np.asarray(centre) - voxel_mm * (n - 1) / 2
    ijk = np.stack(np.meshgrid(*[np.arange(n)] * 3, indexing="ij"), -1).astype(float)
    return phantom.intensity(index_to_ras(affine, ijk)).astype(np.float32), affine


@pytest.fixture(scope="module")
def small_phantom():
    markers, diameters = lattice_phantom(SPACING_MM, EXTENT_MM)
    rot = Rotation.from_euler("zyx", [20.0, -7.0, 4.0], degrees=True).as_matrix()
    phantom = MarkerPhantom(markers, diameters, body_radius_mm=75.0, rotation=rot,
                            translation_ras_mm=np.array([1.3, -2.1, 0.7]), edge_mm=1.5)
    image, affine = _image(phantom, 170.0, centre=phantom.translation_ras_mm)
    return phantom, image, affine


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(3, 40))
def test_kabsch_matches_scipy_align_vectors(seed, n):
    rng = np.random.default_rng(seed)
    src = rng.normal(scale=80.0, size=(n, 3))
    rot = Rotation.random(random_state=seed)
    weights = rng.uniform(0.1, 2.0, n)
    dst = rot.apply(src) + rng.normal(scale=30.0, size=3) + rng.normal(scale=0.5, size=(n, 3))
    pose = kabsch(src, dst, weights)
    # scipy: align_vectors(a, b) finds R minimising sum w |a - R b|^2 for centred sets.
    w = weights / weights.sum()
    ref, _ = Rotation.align_vectors(dst - w @ dst, src - w @ src, weights=weights)
    np.testing.assert_allclose(pose.rotation, ref.as_matrix(), atol=ROTATION_ATOL)
    np.testing.assert_allclose(pose.translation_ras_mm, w @ dst - ref.apply(w @ src), atol=1e-7)
    assert np.linalg.det(pose.rotation) == pytest.approx(1.0)


def test_kabsch_never_returns_a_reflection():
    # A mirrored set: the best orthogonal map is a reflection; Umeyama's correction keeps det +1.
    rng = np.random.default_rng(4)
    src = rng.normal(size=(20, 3)) * [50, 30, 10]
    pose = kabsch(src, src * [1, 1, -1])
    assert np.linalg.det(pose.rotation) == pytest.approx(1.0)


def test_robust_fit_ignores_wrong_pairs():
    rng = np.random.default_rng(11)
    src = rng.uniform(-100, 100, (200, 3))
    rot = Rotation.from_euler("xyz", [10, -25, 40], degrees=True)
    dst = rot.apply(src) + [5.0, -3.0, 12.0] + rng.normal(scale=0.05, size=src.shape)
    wrong = rng.choice(200, 40, replace=False)
    dst[wrong] += rng.normal(scale=15.0, size=(40, 3))
    pose, weights = robust_rigid_fit(src, dst)
    inlier = np.setdiff1d(np.arange(200), wrong)
    ref, _ = Rotation.align_vectors(dst[inlier] - dst[inlier].mean(0), src[inlier] - src[inlier].mean(0))
    angle = np.degrees((ref * Rotation.from_matrix(pose.rotation).inv()).magnitude())
    assert angle < ROBUST_TOL
    ref_t = dst[inlier].mean(0) - ref.apply(src[inlier].mean(0))
    assert np.linalg.norm(pose.translation_ras_mm - ref_t) < ROBUST_TOL
    assert np.all(weights[wrong] == 0)
    # A plain least-squares fit of all pairs is clearly worse: the check can fail.
    plain = kabsch(src, dst)
    assert np.linalg.norm(plain.translation_ras_mm - ref_t) > 10 * ROBUST_TOL


def test_proper_rotations_are_the_cube_group():
    rots = proper_rotations_24()
    assert len({tuple(r.ravel()) for r in rots}) == 24
    for r in rots:
        np.testing.assert_allclose(r @ r.T, np.eye(3))
        assert np.linalg.det(r) == pytest.approx(1.0)
    # scipy's octahedral group ("O", 24 elements) is the same set (scipy documentation).
    ref = Rotation.create_group("O").as_matrix()
    ours = {tuple(np.rint(r).astype(int).ravel()) for r in rots}
    assert ours == {tuple(np.rint(r).astype(int).ravel()) for r in ref}


def test_centroids_of_an_undistorted_phantom(small_phantom):
    phantom, image, affine = small_phantom
    found = detect_markers(image, affine, marker_diameter_mm=6.0, largest_diameter_mm=8.0)
    truth = phantom.markers_ras_mm()
    assert len(found.centroids_ras_mm) == len(truth)
    dist = np.linalg.norm(found.centroids_ras_mm[:, None] - truth[None], axis=-1)
    nearest = dist.min(axis=1)
    assert nearest.max() < CENTROID_TOL_MM
    # Every marker found once.
    assert len(set(dist.argmin(axis=1))) == len(truth)


def test_centroid_equals_scipy_center_of_mass(small_phantom):
    phantom, image, affine = small_phantom
    # One marker, isolated in a small block with the body level removed.
    centre = phantom.markers_ras_mm()[0]
    ijk = np.linalg.solve(affine[:3, :3], centre - affine[:3, 3])
    base = np.rint(ijk).astype(int)
    # A block of +-5 voxels (10 mm) holds the marker and none of its neighbours (20 mm away).
    block = image[base[0] - 5:base[0] + 6, base[1] - 5:base[1] + 6, base[2] - 5:base[2] + 6] - 1.0
    ref = np.array(ndimage.center_of_mass(np.clip(block, 0, None))) + base - 5
    ref_ras = affine[:3, :3] @ ref + affine[:3, 3]
    found = detect_markers(image, affine, marker_diameter_mm=6.0, largest_diameter_mm=8.0)
    ours = found.centroids_ras_mm[np.argmin(np.linalg.norm(found.centroids_ras_mm - centre, axis=1))]
    # Both are unbiased estimates of the same centre; they differ only by which faint
    # edge voxels each includes (the window), well under the centroid tolerance.
    assert np.linalg.norm(ours - ref_ras) < CENTROID_TOL_MM


def test_spurious_blobs_are_rejected(small_phantom):
    phantom, image, affine = small_phantom
    img = image.copy()
    n = img.shape[0]
    img[5:60, 8, 42] += 2.0                  # a thin rod, clear of the markers (elongated)
    img[72:79, 72:79, 72:79] += 2.0          # a bright block, 14 mm (large)
    img[2:16, 2:16, 60:74] += 2.0            # a 28 mm block: wider than the background box
    img[10, 75, 10] += 1.5                   # a one-voxel speck (small)
    assert img.shape == (n, n, n)
    found = detect_markers(img, affine, marker_diameter_mm=6.0, largest_diameter_mm=8.0)
    assert len(found.centroids_ras_mm) == len(phantom.markers_mm)
    assert found.rejected["elongated"] >= 1
    assert found.rejected["large"] >= 1
    assert found.rejected["small"] >= 1
    # The widest block is background (the opening keeps it), not a detection.
    corner = affine[:3, :3] @ np.array([9.0, 9.0, 67.0]) + affine[:3, 3]
    assert np.linalg.norm(found.centroids_ras_mm - corner, axis=1).min() > 20.0


def test_matching_tolerates_missing_and_spurious_markers(small_phantom):
    phantom, _, _ = small_phantom
    rng = np.random.default_rng(8)
    truth = phantom.markers_ras_mm()
    keep = np.sort(rng.choice(len(truth), len(truth) - 12, replace=False))
    spurious = rng.uniform(-60, 60, (9, 3)) + phantom.translation_ras_mm
    detections = np.concatenate([truth[keep] + rng.normal(scale=0.1, size=(len(keep), 3)), spurious])
    order = rng.permutation(len(detections))
    detections = detections[order]
    guess = RigidPose(Rotation.from_euler("z", 18.0, degrees=True).as_matrix(), np.zeros(3))
    m = match_markers(phantom.markers_mm, detections, guess)
    # Every true detection paired with its own marker; spurious ones paired only if they
    # happen to sit within the gate of a missing marker (then they are counted matched).
    back = {int(d): int(mk) for mk, d in zip(m.marker_index, m.detection_index, strict=True)}
    inv = np.argsort(order)
    for j, marker in enumerate(keep):
        assert back.get(int(inv[j])) == int(marker)
    assert m.unmatched_markers <= 12
    assert m.unmatched_detections >= 9 - (12 - m.unmatched_markers)
    angle, shift = m.pose.compose_error(RigidPose(phantom.rotation, phantom.translation_ras_mm))
    assert angle < 0.05 and shift < 0.1


@pytest.mark.parametrize("angle_deg", [1e-7, 0.3, 45.0, 179.0])
def test_rotation_angle_matches_scipy(angle_deg):
    """The pose's rotation angle against scipy's ``Rotation.magnitude`` (outside reference),
    down to angles whose trace differs from 3 by less than its rounding."""
    rot = Rotation.from_rotvec(np.deg2rad(angle_deg) * np.array([0.3, -0.5, 0.81]) / np.linalg.norm(
        [0.3, -0.5, 0.81]))
    got = RigidPose(rot.as_matrix(), np.zeros(3)).rotation_angle_deg()
    assert got == pytest.approx(np.degrees(rot.magnitude()), rel=1e-9)


def test_orientation_search_finds_the_pose_and_needs_the_feature(small_phantom):
    phantom, _, _ = small_phantom
    detections = phantom.markers_ras_mm()
    # The phantom is turned 20 degrees about z (and a little about y, x); the search
    # starts from 18 degrees about z and tries the 24 axis-aligned turns about that.
    m = match_any_orientation(phantom.markers_mm, detections,
                              base_rotation=Rotation.from_euler("z", 18.0, degrees=True).as_matrix())
    angle, shift = m.pose.compose_error(RigidPose(phantom.rotation, phantom.translation_ras_mm))
    assert angle < 1e-6 and shift < 1e-6
    assert m.unmatched_markers == 0
    # Negative control: the lattice alone (no orientation markers) is matched just as
    # well by a wrong orientation, so the feature is what makes the pose unambiguous.
    lattice = phantom.markers_mm[:-3]
    counts = []
    for rot in proper_rotations_24():
        r = rot @ phantom.rotation
        guess = RigidPose(r, detections[:-3].mean(0) - r @ lattice.mean(0))
        counts.append(len(match_markers(lattice, detections[:-3], guess).marker_index))
    assert counts.count(max(counts)) > 1


#: Oblique, anisotropic grid (2 x 2 x 3 mm, tilted 10 degrees): markers sampled at 3 mm
#: along one axis carry more aliasing bias (measured: 0.01 mm typical, 0.06 mm largest);
#: 0.1 mm bound.
OBLIQUE_TOL_MM = 0.1


def test_centroids_on_an_oblique_anisotropic_grid():
    markers, diameters = lattice_phantom(SPACING_MM, 40.0)
    phantom = MarkerPhantom(markers, diameters, body_radius_mm=60.0, edge_mm=2.0)
    shape = (70, 70, 48)
    affine = np.eye(4)
    affine[:3, :3] = Rotation.from_euler("x", 10.0, degrees=True).as_matrix() * [2.0, 2.0, 3.0]
    affine[:3, 3] = -affine[:3, :3] @ ((np.array(shape) - 1) / 2)
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1).astype(float)
    image = phantom.intensity(index_to_ras(affine, ijk)).astype(np.float32)
    found = detect_markers(image, affine, marker_diameter_mm=6.0, largest_diameter_mm=8.0)
    truth = phantom.markers_ras_mm()
    assert len(found.centroids_ras_mm) == len(truth)
    dist = np.linalg.norm(found.centroids_ras_mm[:, None] - truth[None], axis=-1).min(axis=1)
    assert dist.max() < OBLIQUE_TOL_MM


@settings(max_examples=12, deadline=None)
@given(offset=st.lists(st.floats(-1.0, 1.0), min_size=3, max_size=3))
def test_centroid_follows_a_sub_voxel_shift(offset):
    # Invariant: shifting a marker by a fraction of a voxel shifts its centroid by as much.
    shift = VOXEL_MM * np.asarray(offset)
    phantom = MarkerPhantom(np.array([[0.0, 0.0, 0.0], *np.eye(3) * 24.0]), 6.0, body_radius_mm=40.0,
                            translation_ras_mm=shift, edge_mm=1.5)
    image, affine = _image(phantom, 90.0)
    found = detect_markers(image, affine, marker_diameter_mm=6.0, expected_count=4)
    centre = found.centroids_ras_mm[np.argmin(np.linalg.norm(found.centroids_ras_mm - shift, axis=1))]
    assert np.linalg.norm(centre - shift) < CENTROID_TOL_MM
