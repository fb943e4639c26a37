"""Frames (nl_unwarp.frames): patient positions, table position, world <-> device.

Outside references: the DICOM patient frame and patient positions (PS3.3
C.7.6.2.1.1 and C.7.3.1.1.2, the words recalled from memory), the BIDS
``TablePosition`` definition (read from the BIDS schema shipped by
bidsschematools), nibabel's orientation codes, and the physical symmetry that
one object seen in two patient positions is distorted identically in the
device frame.
"""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from nl_unwarp.frames import (
    LPS_FROM_RAS,
    PATIENT_POSITIONS,
    DeviceFrame,
    offset_from_table_position,
    rotation_for_position,
)
from nl_unwarp.resample import correct_image
from nl_unwarp.warp import DEFAULT_TOLERANCE_MM, compute_warp

#: Rigid maps of points up to ~1e3 mm: a few float64 ulps.
ROUND_TRIP_MM = 1e-9
#: Displacements are stored as float32: ~6e-8 relative of a few mm, plus the
#: sub-ulp differences of rotating by different signed permutations.
FLOAT32_MM = 1e-5
#: Jacobian determinants near 1, stored as float32.
FLOAT32_JAC = 1e-6
#: Corrected values (data ~ N(0, 1)): float32 positions (~1e-6 voxel) times
#: the data gradient (a few per voxel), and float32 sums in the kernel.
CORRECTED_TOL = 1e-4

HYPOTHESIS = settings(max_examples=60, deadline=None, derandomize=True, database=None)

POSITIONS = sorted(PATIENT_POSITIONS)


@pytest.mark.parametrize("position", POSITIONS)
def test_positions_are_proper_rotations(position):
    rot = PATIENT_POSITIONS[position]
    np.testing.assert_array_equal(rot @ rot.T, np.eye(3))
    assert np.linalg.det(rot) == pytest.approx(1.0, abs=1e-15)
    # Signed permutations: the patient axes lie along the bore axes.
    assert set(np.unique(rot)) <= {-1.0, 0.0, 1.0}


# Directions of the scanner room, in the device frame (CONVENTIONS.md
# section 1: the device frame is the patient LPS frame of a head-first-supine
# patient, so its +z points into the bore and its +y toward the floor).
INTO_BORE = np.array([0.0, 0.0, 1.0])
DOWN = np.array([0.0, 1.0, 0.0])


def _patient_lps_axes_in_device(position: str) -> np.ndarray:
    """Columns: the patient's left, posterior and superior directions, device frame.

    Built from the words of DICOM PS3.3 C.7.3.1.1.2 (from memory): head first
    (HF) means the head goes into the bore first, feet first (FF) the feet;
    supine (S) is lying face up, prone (P) face down; decubitus right (DR) is
    lying on the right side, decubitus left (DL) on the left side. The DICOM
    patient frame (PS3.3 C.7.6.2.1.1) is right-handed: L x P = S.
    """
    superior = INTO_BORE if position.startswith("HF") else -INTO_BORE
    lying = position[2:]
    if lying in ("S", "P"):
        posterior = DOWN if lying == "S" else -DOWN  # face up: the back is down
        left = np.cross(posterior, superior)
    else:
        left = -DOWN if lying == "DR" else DOWN  # on the right side: the left side is up
        posterior = np.cross(superior, left)
    return np.column_stack([left, posterior, superior])


@pytest.mark.parametrize("position", POSITIONS)
def test_positions_match_geometric_construction(position):
    axes = _patient_lps_axes_in_device(position)
    assert np.linalg.det(axes) == pytest.approx(1.0)  # the construction is right-handed
    # device = R @ patient_lps, so the columns of R are the patient axes.
    np.testing.assert_array_equal(rotation_for_position(position), axes)
    np.testing.assert_array_equal(DeviceFrame(position).device_from_ras, axes @ LPS_FROM_RAS)


def test_rotation_lookup():
    rot = rotation_for_position(" hfdr ")
    np.testing.assert_array_equal(rot, PATIENT_POSITIONS["HFDR"])
    rot[0, 0] = 7.0  # a copy: the table is not modified
    assert PATIENT_POSITIONS["HFDR"][0, 0] == 0.0
    with pytest.raises(ValueError, match="unknown patient position 'LFS'"):
        rotation_for_position("LFS")


def test_lps_from_ras_matches_nibabel_orientation_codes():
    # Source: nibabel.orientations: the L, P, S axes are the R, A, S axes of
    # RAS+ with the first two flipped (DICOM PS3.3 C.7.6.2.1.1 vs NIfTI-1).
    ornt = nib.orientations.axcodes2ornt(("L", "P", "S"))
    np.testing.assert_array_equal(ornt[:, 0], [0, 1, 2])
    np.testing.assert_array_equal(LPS_FROM_RAS, np.diag(ornt[:, 1]))


def test_documented_table_position_case():
    # CONVENTIONS.md section 1: the table moved 2 cm toward the feet of a
    # head-first-supine patient (out of the bore: the 3rd TablePosition value
    # falls by 20 mm) maps the world origin [0, 0, 0] to device [0, 0, -20].
    frame = DeviceFrame("HFS", offset_from_table_position([0.0, 0.0, -20.0]))
    np.testing.assert_array_equal(frame.to_device(np.zeros(3)), [0.0, 0.0, -20.0])


def _bids_table_position_text() -> str:
    bst = pytest.importorskip("bidsschematools.schema")
    return " ".join(bst.load_schema()["objects"]["metadata"]["TablePosition"]["description"].split())


@pytest.mark.parametrize("position", POSITIONS)
@pytest.mark.parametrize("table_mm", [(10.0, 0.0, 0.0), (0.0, 10.0, 0.0), (0.0, 0.0, 10.0),
                                      (3.0, -4.0, 25.0)])
def test_table_position_moves_the_patient_with_the_table(position, table_mm):
    # Source: BIDS TablePosition: "If an observer stands in front of the
    # scanner looking at it, a table moving to the left, up or into the
    # scanner (from the observer's point of view) will increase the 1st, 2nd
    # and 3rd value in the array respectively."
    text = _bids_table_position_text()
    assert ("a table moving to the left, up or into the scanner (from the observer's point of view) "
            "will increase the 1st, 2nd and 3rd value") in text
    # The observer faces the bore: forward = into the bore, up = -DOWN; for a
    # right-handed room, right = forward x up, so left = up x forward.
    forward, up = INTO_BORE, -DOWN
    left = np.cross(up, forward)
    table_motion_device = table_mm[0] * left + table_mm[1] * up + table_mm[2] * forward
    # A point fixed to the patient (world coordinates) moves with the table,
    # whatever the patient position.
    points_ras_mm = np.array([[0.0, 0.0, 0.0], [12.0, -30.0, 55.0]])
    before = DeviceFrame(position).to_device(points_ras_mm)
    after = DeviceFrame(position, offset_from_table_position(table_mm)).to_device(points_ras_mm)
    np.testing.assert_allclose(after - before, np.broadcast_to(table_motion_device, before.shape),
                               atol=ROUND_TRIP_MM)


def test_table_position_rejects_bad_input():
    with pytest.raises(ValueError, match="three finite numbers"):
        offset_from_table_position([1.0, 2.0])
    with pytest.raises(ValueError, match="three finite numbers"):
        offset_from_table_position([1.0, np.nan, 2.0])
    with pytest.raises(ValueError, match="finite"):
        DeviceFrame("HFS", (0.0, np.inf, 0.0))


offsets = arrays(np.float64, 3, elements=st.floats(-500, 500))
points = arrays(np.float64, (5, 3), elements=st.floats(-1000, 1000))


@HYPOTHESIS
@given(position=st.sampled_from(POSITIONS), offset=offsets, pts=points)
def test_to_device_and_back(position, offset, pts):
    frame = DeviceFrame(position, offset)
    device = frame.to_device(pts)
    np.testing.assert_allclose(frame.to_ras(device), pts, rtol=0, atol=ROUND_TRIP_MM)
    # The homogeneous matrix is the same map.
    homogeneous = np.c_[pts, np.ones(len(pts))] @ frame.affine_device_from_ras().T
    np.testing.assert_allclose(homogeneous[:, :3], device, rtol=0, atol=ROUND_TRIP_MM)
    # Vectors rotate without the offset; distances are kept (rigid map).
    np.testing.assert_allclose(frame.vectors_to_ras(device[1:] - device[:1]), pts[1:] - pts[:1],
                               rtol=0, atol=ROUND_TRIP_MM)
    np.testing.assert_allclose(frame.ras_from_device @ frame.device_from_ras, np.eye(3), atol=0)
    # The isocenter is device 0.
    np.testing.assert_allclose(frame.to_device(frame.isocenter_ras_mm), 0.0, atol=ROUND_TRIP_MM)


# --- one object, two patient positions ---------------------------------------

#: Device-frame grid: 4 mm voxels (the 8 mm lattice is upsampled by 2),
#: off the isocenter and not symmetric, reaching ~130 mm from it where the
#: demo coil displaces by millimetres, so that a wrong axis or sign cannot cancel.
GRID_SHAPE = (26, 24, 22)
DEVICE_AFFINE = np.array([
    [4.0, 0.0, 0.0, -40.0],
    [0.0, 4.0, 0.0, -90.0],
    [0.0, 0.0, 4.0, -30.0],
    [0.0, 0.0, 0.0, 1.0],
])
OFFSETS_MM = {"HFS": (4.0, -6.0, 15.0), "HFP": (-2.0, 3.0, -40.0), "FFS": (0.0, 0.0, 0.0),
              "FFP": (7.0, 1.0, 22.0), "HFDR": (-5.0, 2.0, 9.0), "HFDL": (1.0, -1.0, -3.0),
              "FFDR": (0.0, 5.0, 30.0), "FFDL": (-8.0, 0.0, 12.0)}


def _device_grid_mm() -> np.ndarray:
    ijk = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in GRID_SHAPE], indexing="ij"), -1)
    return ijk @ DEVICE_AFFINE[:3, :3].T + DEVICE_AFFINE[:3, 3]


def _scan_as(position: str, demo_coil, data: np.ndarray):
    """Warp (device frame) and corrected image of the same device grid seen in ``position``."""
    frame = DeviceFrame(position, OFFSETS_MM[position])
    # voxel -> device -> RAS: the voxels sit at the same device positions in every position.
    affine_ras = np.linalg.inv(frame.affine_device_from_ras()) @ DEVICE_AFFINE
    np.testing.assert_allclose(frame.to_device(affine_ras[:3, 3]), DEVICE_AFFINE[:3, 3], atol=ROUND_TRIP_MM)
    warp = compute_warp(demo_coil, GRID_SHAPE, affine_ras, frame)
    disp_device_mm = warp.disp_ras_mm.astype(float) @ frame.device_from_ras.T
    corrected = correct_image(data, affine_ras, warp, order=3)
    return disp_device_mm, warp.jacobian, corrected


@pytest.fixture(scope="module")
def hfs_scan():
    from nl_unwarp.demo import demo_coil_path
    from nl_unwarp.io.coilfile import load_coil

    coil = load_coil(demo_coil_path())
    data = np.random.default_rng(7).normal(size=GRID_SHAPE).astype(np.float32)
    return coil, data, _scan_as("HFS", coil, data)


def test_hfs_warp_matches_direct_series_evaluation(hfs_scan):
    # Reference: the coil series evaluated directly at the device points
    # (CoilModel.displacement), where compute_warp interpolates a lattice.
    coil, _data, (disp_device_mm, _jac, _corr) = hfs_scan
    direct = coil.displacement(_device_grid_mm())
    assert np.abs(direct).max() > 1.0  # a real, mm-scale distortion on this grid
    np.testing.assert_allclose(disp_device_mm, direct, rtol=0, atol=DEFAULT_TOLERANCE_MM + FLOAT32_MM)


@pytest.mark.parametrize("position", [p for p in POSITIONS if p != "HFS"])
def test_same_object_in_two_positions_gives_the_same_device_warp(position, hfs_scan):
    coil, data, (ref_disp, ref_jac, ref_corrected) = hfs_scan
    disp_device_mm, jac, corrected = _scan_as(position, coil, data)
    np.testing.assert_allclose(disp_device_mm, ref_disp, rtol=0, atol=FLOAT32_MM)
    np.testing.assert_allclose(jac, ref_jac, rtol=0, atol=FLOAT32_JAC)
    np.testing.assert_allclose(corrected, ref_corrected, rtol=0, atol=CORRECTED_TOL)
    # The correction does change the image (the comparison is not of two no-ops).
    assert np.abs(corrected - data).max() > 0.5
