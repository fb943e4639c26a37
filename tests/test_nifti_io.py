"""NIfTI loading and writing (nl_unwarp.io.nifti) and complete-or-nothing outputs (io.atomic).

Reference for the header fields: the NIfTI-1 standard (nifti1.h: qform_code,
sform_code, NIFTI_XFORM_SCANNER_ANAT = 1; dim[0] <= 7), with files made and
read back by nibabel.
"""

from __future__ import annotations

import gzip

import nibabel as nib
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from nl_unwarp.errors import InputError
from nl_unwarp.io.atomic import OutputSet, atomic_path
from nl_unwarp.io.nifti import load_image, write_image

#: nifti1.h NIFTI_XFORM_SCANNER_ANAT.
XFORM_SCANNER = 1
#: The header stores qform (quaternion) and sform rows in float32.
AFFINE_ATOL = 1e-4
#: gzip member header magic bytes (RFC 1952 section 2.3.1).
GZIP_MAGIC = b"\x1f\x8b"

DATA = np.arange(3 * 4 * 5, dtype=np.float32).reshape(3, 4, 5)


def _oblique_affine():
    affine = np.eye(4)
    affine[:3, :3] = Rotation.from_euler("xyz", [12.0, -7.0, 30.0], degrees=True).as_matrix() \
        @ np.diag([1.5, 2.0, 3.5])
    affine[:3, 3] = (-30.0, 12.5, 40.0)
    return affine


def _with_header(path, data=DATA, **fields):
    """Write ``data`` with a header whose geometry fields are set by hand."""
    hdr = nib.Nifti1Header()
    hdr.set_data_shape(data.shape)
    hdr.set_data_dtype(data.dtype)
    for key, value in fields.items():
        hdr[key] = value
    nib.save(nib.Nifti1Image(data, None, header=hdr), str(path))
    return path


def _expect_input_error(path, *words):
    with pytest.raises(InputError) as err:
        load_image(path)
    assert err.value.source == str(path)
    assert str(path) in str(err.value)
    for word in words:
        assert word in err.value.detail
    return err.value


def test_missing_file(tmp_path):
    _expect_input_error(tmp_path / "absent.nii.gz", "not found")


@pytest.mark.parametrize("keep", [0.5, 0.05])
def test_truncated_gzip(tmp_path, keep):
    rng = np.random.default_rng(1)
    good = tmp_path / "good.nii.gz"
    nib.save(nib.Nifti1Image(rng.normal(size=(20, 20, 20)).astype(np.float32), np.eye(4)), str(good))
    blob = good.read_bytes()
    bad = tmp_path / "cut.nii.gz"
    bad.write_bytes(blob[: int(len(blob) * keep)])
    _expect_input_error(bad, "truncated")


def test_truncated_uncompressed(tmp_path):
    good = tmp_path / "good.nii"
    nib.save(nib.Nifti1Image(DATA, np.eye(4)), str(good))
    bad = tmp_path / "cut.nii"
    bad.write_bytes(good.read_bytes()[:400])  # header (352 bytes) and a little data
    _expect_input_error(bad, "truncated")


def test_not_an_image(tmp_path):
    path = tmp_path / "notes.nii"
    path.write_text("not an image\n" * 40)
    _expect_input_error(path, "NIfTI")


def test_other_image_format(tmp_path):
    # A valid image that nibabel reads but is not NIfTI (FreeSurfer MGH).
    path = tmp_path / "volume.mgz"
    nib.save(nib.MGHImage(DATA, np.eye(4)), str(path))
    _expect_input_error(path, "NIfTI", "MGHImage")


def test_no_qform_no_sform(tmp_path):
    path = _with_header(tmp_path / "nocode.nii.gz", qform_code=0, sform_code=0)
    _expect_input_error(path, "qform_code", "sform_code")


@pytest.mark.parametrize(("row", "value"), [("srow_x", [np.nan, 0, 0, 0]),
                                            ("srow_y", [0, 1, 0, np.inf])])
def test_non_finite_sform(tmp_path, row, value):
    rows = {"srow_x": [1.0, 0, 0, 0], "srow_y": [0, 1.0, 0, 0], "srow_z": [0, 0, 1.0, 0]}
    rows[row] = value
    path = _with_header(tmp_path / "nonfinite.nii.gz", qform_code=0, sform_code=1, **rows)
    _expect_input_error(path, "affine", "sform", "non-finite")


def test_non_finite_qform(tmp_path):
    path = _with_header(tmp_path / "qnan.nii.gz", qform_code=1, sform_code=0, qoffset_x=np.nan,
                        pixdim=[1, 1, 1, 1, 1, 0, 0, 0])
    _expect_input_error(path, "affine", "qform", "non-finite")


def test_singular_sform(tmp_path):
    path = _with_header(tmp_path / "flat.nii.gz", qform_code=0, sform_code=1,
                        srow_x=[1.0, 0, 0, 0], srow_y=[0, 0, 0, 0], srow_z=[0, 0, 1.0, 0])
    _expect_input_error(path, "affine", "determinant")


def test_five_dimensional(tmp_path):
    path = tmp_path / "five.nii.gz"
    nib.save(nib.Nifti1Image(np.zeros((2, 3, 4, 5, 2), np.float32), np.eye(4)), str(path))
    _expect_input_error(path, "dim", "5-D")


def test_two_dimensional_gets_a_third_axis(tmp_path):
    path = tmp_path / "slice.nii.gz"
    nib.save(nib.Nifti1Image(DATA[:, :, 0], _oblique_affine()), str(path))
    image = load_image(path)
    assert image.data.shape == (3, 4, 1) and image.spatial_shape == (3, 4, 1)
    np.testing.assert_array_equal(image.data[:, :, 0], DATA[:, :, 0])
    np.testing.assert_allclose(image.affine, _oblique_affine(), atol=AFFINE_ATOL)


def test_four_d_and_nifti2_load(tmp_path):
    series = np.stack([DATA, 2 * DATA], -1)
    nib.save(nib.Nifti2Image(series, _oblique_affine()), str(tmp_path / "series.nii.gz"))
    image = load_image(tmp_path / "series.nii.gz")
    assert image.data.shape == (3, 4, 5, 2) and image.spatial_shape == (3, 4, 5)
    np.testing.assert_array_equal(image.data, series)


def test_write_image_sets_scanner_qform_and_sform(tmp_path):
    affine = _oblique_affine()
    # A source header with an aligned sform only, no qform, and a scaling that
    # must not be carried over to float output.
    src = nib.Nifti1Header()
    src.set_data_shape(DATA.shape)
    src.set_sform(np.diag([2.0, 2.0, 2.0, 1.0]), code=2)
    src.set_qform(None, code=0)
    src.set_slope_inter(3.0, 1.0)
    path = tmp_path / "out.nii.gz"
    with OutputSet() as out:
        assert write_image(out, path, DATA, affine, header=src) == path
    img = nib.load(str(path))
    assert int(img.header["qform_code"]) == XFORM_SCANNER
    assert int(img.header["sform_code"]) == XFORM_SCANNER
    np.testing.assert_allclose(img.get_qform(), affine, atol=AFFINE_ATOL)
    np.testing.assert_allclose(img.get_sform(), affine, atol=AFFINE_ATOL)
    slope, inter = img.header.get_slope_inter()
    assert slope is None and inter is None
    assert img.get_data_dtype() == np.float32
    np.testing.assert_array_equal(np.asanyarray(img.dataobj), DATA)
    assert path.read_bytes()[:2] == GZIP_MAGIC


def _listing(folder):
    return sorted(p.name for p in folder.iterdir())


def test_output_set_leaves_nothing_on_error(tmp_path):
    before = tmp_path / "kept.nii.gz"
    nib.save(nib.Nifti1Image(DATA, np.eye(4)), str(before))
    original = before.read_bytes()
    with pytest.raises(RuntimeError, match="boom"), OutputSet() as out:
        write_image(out, tmp_path / "a.nii.gz", DATA, np.eye(4))
        write_image(out, tmp_path / "sub" / "b.nii", DATA, np.eye(4))
        write_image(out, before, 2 * DATA, np.eye(4))
        # The temporaries exist while the set is open.
        assert len(_listing(tmp_path)) == 4 and len(_listing(tmp_path / "sub")) == 1
        raise RuntimeError("boom")
    # The folder the set created is removed too: nothing of the failed run remains.
    assert _listing(tmp_path) == ["kept.nii.gz"]
    assert before.read_bytes() == original  # an existing file is not touched


def test_output_set_renames_all_on_success(tmp_path):
    names = ["a.nii.gz", "b.nii", "c.json"]
    with OutputSet() as out:
        for k, name in enumerate(names[:2]):
            write_image(out, tmp_path / name, DATA + k, np.eye(4))
        tmp_json = out.reserve(tmp_path / names[2])
        tmp_json.write_text("{}\n")
        # Temporaries sit beside their targets with the same extension, so
        # that nibabel chooses the same format (gzip for .nii.gz).
        pending = _listing(tmp_path)
        assert not set(names) & set(pending)
        gz = [p for p in pending if p.endswith(".nii.gz")]
        assert len(gz) == 1 and (tmp_path / gz[0]).read_bytes()[:2] == GZIP_MAGIC
    assert _listing(tmp_path) == names
    for k, name in enumerate(names[:2]):
        np.testing.assert_array_equal(np.asanyarray(nib.load(str(tmp_path / name)).dataobj),
                                      DATA + k)
    assert (tmp_path / "c.json").read_text() == "{}\n"
    with gzip.open(tmp_path / "a.nii.gz") as fh:
        assert len(fh.read()) > DATA.nbytes


def test_atomic_path(tmp_path):
    target = tmp_path / "model.json"
    with atomic_path(target) as tmp:
        tmp.write_text("x")
        assert not target.exists()
    assert target.read_text() == "x" and _listing(tmp_path) == ["model.json"]
    with pytest.raises(ValueError), atomic_path(tmp_path / "never.json") as tmp:
        tmp.write_text("y")
        raise ValueError
    assert _listing(tmp_path) == ["model.json"]
