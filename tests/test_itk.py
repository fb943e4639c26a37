"""The ITK/ANTs displacement-field file (nl_unwarp.io.itk), read by ITK itself.

Layout facts are checked with nibabel against the NIfTI-1 standard and
CONVENTIONS.md section 4; the meaning of the file is checked by letting
SimpleITK and antspyx resample the raw image through it: times our Jacobian
map, that must reproduce our corrected image.

Both layouts we write are covered: the field on the raw grid (margin 0) and
the default, the raw grid grown by ``FIELD_MARGIN_MM`` on every side (so that
ITK, which applies identity outside a field, never leaves it). ITK resamples
onto the raw grid in both; with the margin its trilinear interpolation of the
field falls on the field's nodes, as without.
"""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage
from scipy.spatial.transform import Rotation

from nl_unwarp.api import FIELD_MARGIN_MM, FrameSpec, WarpOutputs, correct_file
from nl_unwarp.compose import grid_with_margin, margin_slices
from nl_unwarp.demo import demo_coil_path
from nl_unwarp.errors import InputError
from nl_unwarp.frames import DeviceFrame
from nl_unwarp.io.atomic import OutputSet
from nl_unwarp.io.itk import read_itk_field, write_itk_field
from nl_unwarp.warp import compute_warp

sitk = pytest.importorskip("SimpleITK")
ants = pytest.importorskip("ants")

#: NIfTI-1 intent codes (nifti1.h): 1006 displacement vector, 1007 vector.
NIFTI_INTENT_DISPVECT = 1006
NIFTI_INTENT_VECTOR = 1007
#: nibabel stores the affine as float32 in the header.
AFFINE_ATOL = 1e-4
#: ITK vs our correction, intensities 100 +- 30 (times Jacobians 0.8-1.0).
#: The output grid is the field's own grid, so ITK's trilinear interpolation
#: of the field is exact at the nodes up to the rounding of the physical ->
#: index map (~1e-12 voxel); both sides evaluate the same cubic B-spline with
#: mirror boundaries (ITK's BSplineDecompositionImageFilter, scipy's
#: spline_filter). What remains is float32 rounding of coefficients, field and
#: output (measured 1e-5); 1e-4 is ~1e-6 of the intensity scale.
ITK_ATOL = 1e-4
#: Voxels kept away from the grid edge in the comparison: in the half-voxel
#: margin around the raw grid ITK's linear interpolator holds the edge sample
#: while we mirror (scipy's rule; 0.18 apart there on this image), and the
#: two sides decide "outside the field of view" each by its own test.
EDGE_MARGIN = 3
#: The distortion must move intensities by far more than the tolerance.
MIN_EFFECT = 1.0

SHAPE = (40, 36, 30)
ZOOMS_MM = (3.0, 2.5, 4.0)
#: BIDS TablePosition of an off-centre table (mm-scale displacements), and the
#: device offset it means, t = (-tp1, -tp2, tp3): the BIDS TablePosition text (observer's
#: left is the HFS patient's right, device -x); CONVENTIONS.md section 1 has +tp1, which
#: tests/test_frames.py shows to be wrong.
TABLE_POSITION_MM = (20.0, 15.0, 60.0)
OFFSET_MM = (-20.0, -15.0, 60.0)


def _affine():
    rot = Rotation.from_euler("xyz", [15.0, -10.0, 25.0], degrees=True).as_matrix()
    affine = np.eye(4)
    affine[:3, :3] = rot @ np.diag(ZOOMS_MM)
    affine[:3, 3] = np.array([20.0, -15.0, 40.0]) - affine[:3, :3] @ ((np.array(SHAPE) - 1) / 2)
    return affine


def _save(data, affine, path, intent=None):
    img = nib.Nifti1Image(data, affine)
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    if intent is not None:
        img.header.set_intent(intent)
    nib.save(img, str(path))


@pytest.fixture(scope="module", params=[0.0, FIELD_MARGIN_MM], ids=["raw-grid", "margin"])
def case(tmp_path_factory, request):
    """Raw image, and our corrections (cubic and trilinear) with field and Jacobian.

    The field file is on the raw grid (margin 0) or on the raw grid grown by the margin.
    """
    root = tmp_path_factory.mktemp("itk")
    (root / "margin").write_text(repr(request.param))
    rng = np.random.default_rng(2024)
    vol = ndimage.gaussian_filter(rng.normal(size=SHAPE), 1.5, mode="wrap")
    vol = (100.0 + 30.0 * vol / np.abs(vol).max()).astype(np.float32)
    _save(vol, _affine(), root / "raw.nii.gz")
    frame = FrameSpec("HFS", table_position_mm=TABLE_POSITION_MM)
    for order in (1, 3):
        correct_file(root / "raw.nii.gz", demo_coil_path(), root / f"corrected{order}.nii.gz",
                     warp_outputs=WarpOutputs(field=root / f"field{order}.nii.gz",
                                              jacobian=root / f"jacobian{order}.nii.gz",
                                              field_margin_mm=request.param),
                     frame=frame, order=order)
    return root


def _array(path):
    return np.asarray(nib.load(str(path)).dataobj)


def _field_grid(root):
    """Shape and affine of the field file's grid, and where the raw grid sits in it."""
    raw_affine = nib.load(str(root / "raw.nii.gz")).affine  # as stored (float32)
    shape, affine = grid_with_margin(SHAPE, raw_affine, float((root / "margin").read_text()))
    return shape, affine, margin_slices(SHAPE, shape)


def _interior(a):
    m = EDGE_MARGIN
    return a[m:-m, m:-m, m:-m]


def _check_against(root, external, order):
    ours = _array(root / f"corrected{order}.nii.gz")
    jac = _array(root / f"jacobian{order}.nii.gz")
    raw = _array(root / "raw.nii.gz")
    assert np.abs(_interior(ours - raw * jac)).max() > MIN_EFFECT
    np.testing.assert_allclose(_interior(external * jac), _interior(ours), rtol=0, atol=ITK_ATOL)


def _sitk_resample(raw_path, field_path, interpolator):
    # Reading as in CONVENTIONS.md section 4: vector image, then the transform
    # takes the buffer of a copy.
    raw = sitk.ReadImage(str(raw_path), sitk.sitkFloat64)
    field = sitk.ReadImage(str(field_path), sitk.sitkVectorFloat64)
    transform = sitk.DisplacementFieldTransform(sitk.Image(field))
    out = sitk.Resample(raw, raw, transform, interpolator, 0.0, sitk.sitkFloat64)
    return sitk.GetArrayFromImage(out).transpose(2, 1, 0)  # ITK (z, y, x) -> (x, y, z)


def test_field_file_layout(case, demo_coil):
    img = nib.load(str(case / "field3.nii.gz"))
    data = np.asanyarray(img.dataobj)
    hdr = img.header
    shape, field_affine, inner = _field_grid(case)
    # ITK's NIfTI reader: a displacement field is 5-D with dim[4] = 1 and
    # dim[5] = 3 vector components (CONVENTIONS.md section 4, verified there).
    assert data.shape == shape + (1, 3)
    assert data.dtype == np.float32
    assert int(hdr["intent_code"]) == NIFTI_INTENT_VECTOR
    assert int(hdr["qform_code"]) == 1 and int(hdr["sform_code"]) == 1
    np.testing.assert_allclose(img.get_qform(), field_affine, atol=AFFINE_ATOL)
    np.testing.assert_allclose(img.get_sform(), field_affine, atol=AFFINE_ATOL)
    # The raw grid's voxels are the field's interior voxels (same world points).
    raw_affine = nib.load(str(case / "raw.nii.gz")).affine
    offset = np.array([sl.start for sl in inner], float)
    np.testing.assert_allclose(img.affine[:3, :3] @ offset + img.affine[:3, 3], raw_affine[:3, 3],
                               atol=AFFINE_ATOL)
    # Vectors are LPS = diag(-1, -1, 1) RAS (DICOM PS3.3 C.7.6.2.1.1): compare
    # with the RAS warp computed on the same grid.
    warp = compute_warp(demo_coil, shape, field_affine,
                        DeviceFrame("HFS", OFFSET_MM))
    voxel = tuple(int(v) for v in np.array((31, 5, 22)) + offset)
    ras = warp.disp_ras_mm[voxel]
    assert np.linalg.norm(ras[:2]) > 0.5
    np.testing.assert_array_equal(data[voxel][0], ras * np.array([-1, -1, 1], np.float32))
    np.testing.assert_array_equal(data[..., 0, :2], -warp.disp_ras_mm[..., :2])
    np.testing.assert_array_equal(data[..., 0, 2], warp.disp_ras_mm[..., 2])


def test_known_vector_and_round_trip(tmp_path):
    affine = _affine()
    disp_ras = np.zeros(SHAPE[:2] + (4, 3), np.float32)
    disp_ras[1, 2, 3] = (1.5, -2.0, 3.25)  # RAS: right, posterior, superior
    path = tmp_path / "field.nii.gz"
    with OutputSet() as out:
        write_itk_field(out, path, disp_ras, affine)
    stored = _array(path)
    np.testing.assert_array_equal(stored[1, 2, 3, 0], [-1.5, 2.0, 3.25])  # LPS
    assert not np.any(np.delete(stored.reshape(-1, 3), np.ravel_multi_index((1, 2, 3),
                                                                              disp_ras.shape[:3]), 0))
    # SimpleITK sees the same LPS vector at the same physical point.
    field = sitk.ReadImage(str(path), sitk.sitkVectorFloat64)
    np.testing.assert_array_equal(field.GetPixel(1, 2, 3), [-1.5, 2.0, 3.25])
    got, got_affine = read_itk_field(path)
    np.testing.assert_array_equal(got, disp_ras)
    np.testing.assert_allclose(got_affine, affine, atol=AFFINE_ATOL)


def test_read_itk_field_rejects_other_layouts(tmp_path):
    affine = _affine()
    vectors = np.zeros((4, 5, 6, 1, 3), np.float32)
    _save(vectors, affine, tmp_path / "dispvect.nii.gz", intent=NIFTI_INTENT_DISPVECT)
    with pytest.raises(InputError, match="intent_code") as err:
        read_itk_field(tmp_path / "dispvect.nii.gz")
    assert "dispvect.nii.gz" in str(err.value)
    _save(vectors[:, :, :, 0, :], affine, tmp_path / "four_d.nii.gz", intent=NIFTI_INTENT_VECTOR)
    with pytest.raises(InputError, match="dim") as err:
        read_itk_field(tmp_path / "four_d.nii.gz")
    assert "four_d.nii.gz" in str(err.value)


@pytest.mark.parametrize(("order", "interpolator"), [(3, "sitkBSpline"), (1, "sitkLinear")])
def test_simpleitk_reproduces_correction(case, order, interpolator):
    external = _sitk_resample(case / "raw.nii.gz", case / f"field{order}.nii.gz",
                              getattr(sitk, interpolator))
    _check_against(case, external, order)


def test_simpleitk_comparison_catches_a_frame_error(case, tmp_path):
    # Negative control: the same vectors written as if they were RAS (no
    # LPS flip) make ITK sample elsewhere, far beyond the tolerance.
    img = nib.load(str(case / "field3.nii.gz"))
    flipped = np.asanyarray(img.dataobj) * np.array([-1, -1, 1], np.float32)
    _save(flipped, img.affine, tmp_path / "wrong.nii.gz", intent=NIFTI_INTENT_VECTOR)
    external = _sitk_resample(case / "raw.nii.gz", tmp_path / "wrong.nii.gz", sitk.sitkBSpline)
    ours = _array(case / "corrected3.nii.gz")
    jac = _array(case / "jacobian3.nii.gz")
    assert np.abs(_interior(external * jac - ours)).max() > 1000 * ITK_ATOL


@pytest.mark.parametrize(("order", "interpolator"), [(3, "bSpline"), (1, "linear")])
def test_antspyx_reproduces_correction(case, order, interpolator):
    raw = ants.image_read(str(case / "raw.nii.gz"))
    out = ants.apply_transforms(fixed=raw, moving=raw,
                                transformlist=[str(case / f"field{order}.nii.gz")],
                                whichtoinvert=[False], interpolator=interpolator)
    external = out.numpy().astype(float)
    assert external.shape == SHAPE
    _check_against(case, external, order)


@pytest.mark.skipif(tuple(int(v) for v in sitk.Version.VersionString().split(".")[:2]) < (2, 4),
                    reason="ITK < 5.4 reads intent 1006 vectors as LPS")
def test_itk_reads_intent_1006_as_ras(case, tmp_path):
    # CONVENTIONS.md section 4: ITK >= 5.4 (SimpleITK >= 2.4) converts intent
    # 1006 vectors from RAS, and leaves 1007 (our choice) as LPS.
    img = nib.load(str(case / "field3.nii.gz"))
    data = np.asanyarray(img.dataobj)
    _save(data, img.affine, tmp_path / "f1006.nii.gz", intent=NIFTI_INTENT_DISPVECT)
    voxel = tuple(int(sl.start) + v for sl, v in zip(_field_grid(case)[2], (7, 6, 5), strict=True))
    stored = data[voxel + (0,)].astype(float)
    assert np.abs(stored[:2]).min() > 0.05
    as_1007 = sitk.ReadImage(str(case / "field3.nii.gz"), sitk.sitkVectorFloat64).GetPixel(*voxel)
    as_1006 = sitk.ReadImage(str(tmp_path / "f1006.nii.gz"), sitk.sitkVectorFloat64).GetPixel(*voxel)
    np.testing.assert_allclose(as_1007, stored, rtol=1e-7)
    np.testing.assert_allclose(as_1006, stored * [-1, -1, 1], rtol=1e-7)
