"""Warp fields (nl_unwarp.warp.compute_warp) against slow direct references.

The references live here: the coil series evaluated at every voxel
(``CoilModel.encode``), Jacobians from central finite differences of the
encoded positions, and the masks from the device radius computed directly.
"""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from nl_unwarp import api
from nl_unwarp.api import FrameSpec, correct_file
from nl_unwarp.coil import CoilModel
from nl_unwarp.frames import PATIENT_POSITIONS, DeviceFrame, rotation_for_position
from nl_unwarp.resample import correct_image
from nl_unwarp.warp import DEFAULT_TOLERANCE_MM, compute_warp

#: An ideal coil encodes r -> r exactly; what remains is float64 rounding in
#: the harmonic recurrences at |r| ~ 300 mm (~1e-13 mm), far below this.
IDENTITY_TOL_MM = 1e-9
#: Unit Jacobian of the identity: float32 storage of 1.0 +- float64 rounding.
IDENTITY_JAC_TOL = 1e-6
#: Central-difference step, mm. Truncation error h^2/6 |u'''| ~ 1e-4/6 *
#: 13^3 * 0.07 / R0^2 ~ 4e-8; rounding ~ 1e-16 * 300 mm / h ~ 3e-12.
FD_STEP_MM = 1e-2
#: Warp Jacobian vs finite differences: lattice upsampling of the determinant
#: (a few 1e-7 on these grids, reported by compute_warp) + float32 storage
#: (6e-8 relative) + finite-difference truncation (above).
JAC_TOL = 1e-5
#: The reported interpolation error comes from ~4000 sampled voxels; the full
#: grid may hold a slightly larger one. Accept up to this factor.
HONESTY_FACTOR = 2.0
#: float32 storage of mm-scale displacements: 10 mm * 6e-8.
FLOAT32_MM = 1e-6

D_RAS_LPS = np.diag([-1.0, -1.0, 1.0])  # DICOM PS3.3 C.7.6.2.1.1 (LPS) vs NIfTI-1 (RAS)


def _oblique(shape, zooms, euler_deg=(20.0, -15.0, 30.0), centre_mm=(10.0, -20.0, 30.0)):
    """A rotated, anisotropic affine whose grid centre sits at ``centre_mm`` (RAS)."""
    rot = Rotation.from_euler("xyz", euler_deg, degrees=True).as_matrix()
    affine = np.eye(4)
    affine[:3, :3] = rot @ np.diag(zooms)
    affine[:3, 3] = np.asarray(centre_mm) - affine[:3, :3] @ ((np.asarray(shape) - 1) / 2)
    return affine


def _axis_aligned(shape, zooms, flip=(1.0, 1.0, 1.0)):
    affine = np.diag([*(np.asarray(zooms) * flip), 1.0])
    affine[:3, 3] = -affine[:3, :3] @ ((np.asarray(shape) - 1) / 2)
    return affine


GRIDS = {
    "ras": ((20, 18, 16), _axis_aligned((20, 18, 16), (4.0, 4.0, 4.0))),
    "lps": ((20, 18, 16), _axis_aligned((20, 18, 16), (4.0, 4.0, 4.0), flip=(-1, -1, 1))),
    "oblique": ((20, 18, 16), _oblique((20, 18, 16), (4.0, 4.0, 4.0))),
    "anisotropic": ((24, 20, 12), _axis_aligned((24, 20, 12), (2.0, 3.5, 6.0))),
    "oblique-anisotropic": ((24, 20, 12), _oblique((24, 20, 12), (2.0, 3.5, 6.0))),
    "single-slice": ((32, 28, 1), _oblique((32, 28, 1), (3.0, 3.0, 5.0))),
}


def _voxels_ras(shape, affine) -> np.ndarray:
    """RAS mm of every voxel, (X, Y, Z, 3)."""
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1).astype(float)
    return ijk @ affine[:3, :3].T + affine[:3, 3]


def _to_device(points_ras, position, offset_mm):
    """r_device = R p_lps + t (CONVENTIONS.md section 1, from memory; R from the table)."""
    rot = rotation_for_position(position)
    return points_ras @ (rot @ D_RAS_LPS).T + np.asarray(offset_mm, float)


def _encoded_ras(coil, points_ras, position, offset_mm):
    """Encoded position in RAS, evaluated directly: the slow, obviously-correct path."""
    rot = rotation_for_position(position)
    r_dev = _to_device(points_ras, position, offset_mm)
    u_dev, _ = coil.encode(r_dev, jacobian=False)
    return (u_dev - np.asarray(offset_mm, float)) @ rot @ D_RAS_LPS


def _direct_disp_ras(coil, points_ras, position, offset_mm):
    return _encoded_ras(coil, points_ras, position, offset_mm) - points_ras


def _fd_jacobian_ras(coil, points_ras, position, offset_mm, step=FD_STEP_MM):
    """(..., 3, 3) central finite differences of the RAS encoded position."""
    jac = np.empty(points_ras.shape + (3,))
    for k in range(3):
        h = np.zeros(3)
        h[k] = step
        plus = _encoded_ras(coil, points_ras + h, position, offset_mm)
        minus = _encoded_ras(coil, points_ras - h, position, offset_mm)
        jac[..., :, k] = (plus - minus) / (2 * step)
    return jac


@pytest.mark.parametrize("grid", list(GRIDS))
@pytest.mark.parametrize("position", list(PATIENT_POSITIONS))
def test_ideal_coil_is_identity(grid, position):
    # By construction: an ideal linear coil (CONVENTIONS.md section 2) encodes
    # every point where it is, in any frame and at any table position.
    shape, affine = GRIDS[grid]
    frame = DeviceFrame(position, (12.0, -30.0, 45.0))
    warp = compute_warp(CoilModel.ideal(), shape, affine, frame)
    assert warp.disp_ras_mm.shape == shape + (3,)
    assert warp.jacobian.shape == shape
    assert np.max(np.abs(warp.disp_ras_mm)) < IDENTITY_TOL_MM
    assert np.max(np.abs(warp.jacobian - 1.0)) < IDENTITY_JAC_TOL
    assert not warp.outside_valid.any()


@pytest.mark.parametrize("grid", ["ras", "lps", "oblique-anisotropic", "single-slice"])
@pytest.mark.parametrize(("position", "offset_mm"), [
    ("HFS", (15.0, -10.0, 60.0)),
    ("FFP", (-20.0, 5.0, -90.0)),
    ("HFDL", (0.0, 25.0, 80.0)),
])
def test_demo_coil_matches_direct_evaluation(demo_coil, grid, position, offset_mm):
    shape, affine = GRIDS[grid]
    coil = demo_coil
    warp = compute_warp(coil, shape, affine, DeviceFrame(position, offset_mm))
    points = _voxels_ras(shape, affine)
    ref = _direct_disp_ras(coil, points, position, offset_mm)
    err = np.linalg.norm(warp.disp_ras_mm - ref, axis=-1).max()
    # The distortion must be large enough for the comparison to mean something.
    assert np.linalg.norm(ref, axis=-1).max() > 0.5
    assert err <= DEFAULT_TOLERANCE_MM
    # Reported error honest: the full-grid error is no more than a small factor
    # above what compute_warp measured on its sample voxels.
    assert err <= HONESTY_FACTOR * warp.interpolation_error_mm + FLOAT32_MM
    assert warp.interpolation_error_mm <= DEFAULT_TOLERANCE_MM


@pytest.mark.parametrize("grid", ["oblique-anisotropic", "single-slice"])
def test_warp_channels_lie_side_by_side(demo_coil, grid):
    """Displacement and Jacobian are views of one block, a voxel's four channels side by side and
    voxels x fastest (what the one-pass kernel reads four at a time), holding the directly
    evaluated displacement (the outside reference of the test above)."""
    from nl_unwarp.compose import interleaved_block

    shape, affine = GRIDS[grid]
    offset_mm = (15.0, -10.0, 60.0)
    warp = compute_warp(demo_coil, shape, affine, DeviceFrame("HFS", offset_mm))
    block = interleaved_block(warp.disp_ras_mm)
    assert block is not None
    nodes = block.reshape(shape[2], shape[1], shape[0], 4).transpose(2, 1, 0, 3)
    np.testing.assert_array_equal(nodes[..., :3], warp.disp_ras_mm)
    np.testing.assert_array_equal(nodes[..., 3], warp.jacobian)
    ref = _direct_disp_ras(demo_coil, _voxels_ras(shape, affine), "HFS", offset_mm)
    assert np.linalg.norm(nodes[..., :3] - ref, axis=-1).max() <= DEFAULT_TOLERANCE_MM


@pytest.mark.parametrize("grid", ["ras", "oblique-anisotropic", "single-slice"])
def test_jacobian_matches_finite_differences(demo_coil, grid):
    shape, affine = GRIDS[grid]
    coil, position, offset = demo_coil, "HFS", (15.0, -10.0, 60.0)
    warp = compute_warp(coil, shape, affine, DeviceFrame(position, offset))
    jac_fd = _fd_jacobian_ras(coil, _voxels_ras(shape, affine), position, offset)
    det_fd = np.linalg.det(jac_fd)
    assert np.ptp(det_fd) > 0.05  # a non-trivial Jacobian on this grid
    assert np.max(np.abs(warp.jacobian - det_fd)) < JAC_TOL
    assert warp.jacobian_interpolation_error < JAC_TOL


def _slice_normal(affine, slice_axis):
    """Unit normal to the plane of the two in-plane voxel axes, pointing along the slice axis."""
    cols = affine[:3, :3]
    a, b = [k for k in range(3) if k != slice_axis]
    normal = np.cross(cols[:, a], cols[:, b])
    normal /= np.linalg.norm(normal)
    return normal if normal @ cols[:, slice_axis] > 0 else -normal


@pytest.mark.parametrize("slice_axis", [None, 0])
@pytest.mark.parametrize("grid", ["anisotropic", "oblique-anisotropic"])
def test_2d_modes_project_displacement_and_jacobian(demo_coil, grid, slice_axis):
    shape, affine = GRIDS[grid]
    coil, position, offset = demo_coil, "HFS", (15.0, -10.0, 60.0)
    frame = DeviceFrame(position, offset)
    points = _voxels_ras(shape, affine)
    # Default slice axis: the largest spacing (axis 2 on these grids).
    normal = _slice_normal(affine, 2 if slice_axis is None else slice_axis)
    disp = _direct_disp_ras(coil, points, position, offset)
    jac = _fd_jacobian_ras(coil, points, position, offset)
    through = disp @ normal
    j_nn = np.einsum("i,...ij,j->...", normal, jac, normal)
    j_inv_nn = np.einsum("i,...ij,j->...", normal, np.linalg.inv(jac), normal)

    plane = compute_warp(coil, shape, affine, frame, mode="inplane", slice_axis=slice_axis)
    thru = compute_warp(coil, shape, affine, frame, mode="throughplane", slice_axis=slice_axis)
    ref_plane = disp - through[..., None] * normal
    ref_thru = through[..., None] * normal
    assert np.abs(through).max() > 0.5 and np.linalg.norm(ref_plane, axis=-1).max() > 0.5
    assert np.linalg.norm(plane.disp_ras_mm - ref_plane, axis=-1).max() <= DEFAULT_TOLERANCE_MM
    assert np.linalg.norm(thru.disp_ras_mm - ref_thru, axis=-1).max() <= DEFAULT_TOLERANCE_MM
    # In-plane part orthogonal to the normal, through-plane part parallel to it.
    assert np.abs(plane.disp_ras_mm @ normal).max() <= DEFAULT_TOLERANCE_MM
    assert np.linalg.norm(np.cross(thru.disp_ras_mm, normal), axis=-1).max() <= DEFAULT_TOLERANCE_MM
    # Matrix determinant lemma, det(A + u v^T) = det(A) (1 + v^T A^-1 u)
    # (Harville, Matrix Algebra From a Statistician's Perspective, 1997, 18.1):
    # through-plane det(I + n n^T (J - I)) = n^T J n;
    # in-plane det(J - n n^T (J - I)) = det(J) n^T J^-1 n.
    assert np.max(np.abs(thru.jacobian - j_nn)) < JAC_TOL
    assert np.max(np.abs(plane.jacobian - np.linalg.det(jac) * j_inv_nn)) < JAC_TOL
    assert plane.mode == "inplane" and thru.mode == "throughplane"


@pytest.mark.parametrize(("position", "offset_mm"), [("HFS", (40.0, -30.0, 90.0)),
                                                     ("FFDR", (-25.0, 10.0, -70.0))])
def test_outside_valid_mask_is_device_radius(demo_coil, position, offset_mm):
    # A 480 mm field of view cut by the 220 mm valid sphere of the demo coil.
    shape, affine = (30, 28, 26), _oblique((30, 28, 26), (16.0, 17.0, 18.0), centre_mm=(0, 0, 0))
    coil = demo_coil
    warp = compute_warp(coil, shape, affine, DeviceFrame(position, offset_mm))
    radius = np.linalg.norm(_to_device(_voxels_ras(shape, affine), position, offset_mm), axis=-1)
    expected = radius > coil.valid_radius_mm
    decided = np.abs(radius - coil.valid_radius_mm) > 1e-6  # ignore exact ties
    assert 0.2 < expected.mean() < 0.9
    np.testing.assert_array_equal(warp.outside_valid[decided], expected[decided])
    assert warp.outside_fraction == pytest.approx(expected.mean(), abs=1.0 / expected.size)


def test_4d_image_uses_one_warp(demo_coil, tmp_path, monkeypatch):
    shape, affine = GRIDS["oblique-anisotropic"]
    rng = np.random.default_rng(4)
    data = rng.normal(100.0, 10.0, shape + (3,)).astype(np.float32)
    src = tmp_path / "series.nii.gz"
    nib.save(nib.Nifti1Image(data, affine), str(src))
    calls = []
    real = api.compute_warp

    def counting(*args, **kwargs):
        calls.append(args)
        return real(*args, **kwargs)

    monkeypatch.setattr(api, "compute_warp", counting)
    frame_spec = FrameSpec("HFS", isocenter_offset_mm=(15.0, -10.0, 60.0))
    correct_file(src, demo_coil, tmp_path / "out.nii.gz", frame=frame_spec)
    assert len(calls) == 1
    got = np.asarray(nib.load(str(tmp_path / "out.nii.gz")).dataobj)
    assert got.shape == shape + (3,)
    # The file stores the affine in float32: use what was read back.
    stored_affine = nib.load(str(src)).affine
    warp = real(demo_coil, shape, stored_affine, DeviceFrame("HFS", (15.0, -10.0, 60.0)))
    for t in range(3):
        np.testing.assert_array_equal(got[..., t], correct_image(data[..., t], stored_affine, warp))
