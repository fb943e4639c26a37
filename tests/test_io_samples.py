"""Field-sample files (nl_unwarp.io.samples): tables and NIfTI field maps, strict errors.

Outside references: Python's float repr (shortest string that round-trips, Python docs /
IEEE 754) for the tables; nibabel's ``apply_affine`` for voxel positions of a NIfTI map;
the DICOM patient frame (LPS = diag(-1, -1, 1) RAS, DICOM PS3.3 C.7.6.2.1.1) and the BIDS
``TablePosition`` definition (observer in front of the scanner; device offset
(-tp1, -tp2, tp3), docs/conventions.md) for maps given in world RAS.
"""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from nibabel.affines import apply_affine

from nl_unwarp.errors import InputError
from nl_unwarp.io.samples import load_field_samples, write_field_samples

HYPOTHESIS = settings(max_examples=30, deadline=None, derandomize=True, database=None)
#: Voxel positions from the affine vs nibabel's apply_affine: float64 products.
AFFINE_TOL_MM = 1e-9


def _table(tmp_path, text: str, name: str = "x.tsv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _error(path, **kwargs) -> str:
    with pytest.raises(InputError) as info:
        load_field_samples(path, **kwargs)
    message = str(info.value)
    assert "\n" not in message and message.startswith(str(path))
    return message


@HYPOTHESIS
@given(values=st.lists(st.tuples(*[st.floats(-1e4, 1e4, allow_nan=False)] * 4), min_size=1, max_size=20),
       gradient=st.floats(1e-3, 1e3))
def test_tables_round_trip_exactly(tmp_path_factory, values, gradient):
    path = tmp_path_factory.mktemp("t") / "z.tsv"
    data = np.array(values, dtype=float)
    write_field_samples(path, data[:, :3], data[:, 3], gradient_mT_per_m=gradient, axis="z")
    samples = load_field_samples(path, axis="z")
    np.testing.assert_array_equal(samples.points_device_mm, data[:, :3])
    np.testing.assert_array_equal(samples.bz_mT, data[:, 3])
    assert samples.gradient_mT_per_m == gradient


def test_comma_separated_tables_and_the_command_line_gradient(tmp_path):
    text = "# field map of an invented coil\nx_mm,y_mm,z_mm,bz_mT\n1,2,3,0.5\n\n4,5,6,-0.25\n"
    path = _table(tmp_path, text)
    samples = load_field_samples(path, gradient_mT_per_m=40.0)
    np.testing.assert_array_equal(samples.points_device_mm, [[1, 2, 3], [4, 5, 6]])
    np.testing.assert_array_equal(samples.bz_mT, [0.5, -0.25])
    assert samples.gradient_mT_per_m == 40.0
    assert "device frame" in samples.frame_note


@pytest.mark.parametrize(("text", "kwargs", "expected"), [
    ("x_mm\ty_mm\tz_mm\tbz_mT\n1\t2\t3\t4\n", {}, "gradient_mT_per_m: nominal gradient not given"),
    ("# gradient_mT_per_m: 40\nx_mm\ty_mm\tz_mm\tbz_mT\n1\t2\t3\t4\n", {"gradient_mT_per_m": 30.0},
     "the file states 40 mT/m, the command line 30 mT/m"),
    ("# gradient_mT_per_m: fast\nx_mm\ty_mm\tz_mm\tbz_mT\n", {}, "line 1: gradient_mT_per_m 'fast' is not"),
    ("# gradient_mT_per_m: -4\nx_mm\ty_mm\tz_mm\tbz_mT\n", {},
     "line 1: gradient_mT_per_m must be a positive"),
    ("# axis: y\nx_mm\ty_mm\tz_mm\tbz_mT\n1\t2\t3\t4\n", {"axis": "x", "gradient_mT_per_m": 1.0},
     "line 1: the file says axis y, but it was given as the x samples"),
    ("x\ty\tz\tBz\n1\t2\t3\t4\n", {"gradient_mT_per_m": 1.0},
     "line 1: header must be x_mm, y_mm, z_mm, bz_mT"),
    ("x_mm\ty_mm\tz_mm\tbz_mT\n1\t2\t3\n", {"gradient_mT_per_m": 1.0}, "line 2: 3 values, expected 4"),
    ("x_mm\ty_mm\tz_mm\tbz_mT\n1\t2\t3\t4\n1\t2\tthree\t4\n", {"gradient_mT_per_m": 1.0},
     "line 3, column z_mm: 'three' is not a number"),
    ("x_mm\ty_mm\tz_mm\tbz_mT\n1\t2\t3\tnan\n", {"gradient_mT_per_m": 1.0},
     "line 2, column bz_mT: nan is not finite"),
    ("x_mm\ty_mm\tz_mm\tbz_mT\n", {"gradient_mT_per_m": 1.0}, "no samples after the header row"),
    ("# only comments\n", {"gradient_mT_per_m": 1.0}, "no header row"),
])
def test_table_errors_name_the_line_and_field(tmp_path, text, kwargs, expected):
    path = _table(tmp_path, text)
    assert expected in _error(path, **kwargs)


def test_missing_and_binary_files(tmp_path):
    assert "field sample file not found" in _error(tmp_path / "none.tsv")
    binary = tmp_path / "b.tsv"
    binary.write_bytes(b"\xff\xfe\x00x")
    assert "not UTF-8" in _error(binary)


def _map(tmp_path, data, affine, name="bz.nii.gz", units="mm"):
    img = nib.Nifti1Image(np.asarray(data, dtype=np.float32), affine)
    img.header.set_xyzt_units(units)
    path = tmp_path / name
    nib.save(img, str(path))
    return path


def _oblique_affine():
    angle = 0.3
    rot = np.array([[np.cos(angle), 0, np.sin(angle)], [0, 1, 0], [-np.sin(angle), 0, np.cos(angle)]])
    affine = np.eye(4)
    affine[:3, :3] = rot * [4.0, 5.0, 6.0]
    affine[:3, 3] = [-20.0, 10.0, -30.0]
    return affine


def test_nifti_maps_take_the_affine_as_device_mm(tmp_path):
    rng = np.random.default_rng(4)
    data = rng.normal(size=(4, 5, 3))
    data[1, 2, 0] = np.nan  # NaN voxels are not samples
    affine = _oblique_affine()
    samples = load_field_samples(_map(tmp_path, data, affine), gradient_mT_per_m=25.0)
    keep = np.isfinite(data)
    expected = apply_affine(affine, np.argwhere(keep))
    np.testing.assert_allclose(samples.points_device_mm, expected, atol=AFFINE_TOL_MM)
    np.testing.assert_allclose(samples.bz_mT, data[keep].astype(np.float32))
    assert samples.bz_mT.size == data.size - 1
    assert "affine taken as device-frame mm" in samples.frame_note


def test_nifti_maps_in_world_ras_with_a_table_position(tmp_path):
    # HFS: device = LPS = diag(-1, -1, 1) RAS (DICOM), shifted by (-tp1, -tp2, tp3) (BIDS
    # TablePosition, docs/conventions.md).
    data = np.arange(24, dtype=float).reshape(2, 3, 4)
    affine = _oblique_affine()
    tp = (5.0, -7.0, 40.0)
    samples = load_field_samples(_map(tmp_path, data, affine), gradient_mT_per_m=25.0, position="HFS",
                                 table_position_mm=tp)
    ras = apply_affine(affine, np.argwhere(np.isfinite(data)))
    expected = ras * [-1.0, -1.0, 1.0] + [-tp[0], -tp[1], tp[2]]
    np.testing.assert_allclose(samples.points_device_mm, expected, atol=AFFINE_TOL_MM)
    assert "world RAS" in samples.frame_note


def test_nifti_map_errors(tmp_path):
    affine = np.eye(4)
    two = _map(tmp_path, np.zeros((2, 2, 2, 2)), affine, "two.nii.gz")
    assert "2 volumes" in _error(two, gradient_mT_per_m=1.0)
    metres = _map(tmp_path, np.zeros((2, 2, 2)), affine, "m.nii.gz", units="meter")
    assert "xyzt_units: spatial unit is meter" in _error(metres, gradient_mT_per_m=1.0)
    empty = _map(tmp_path, np.full((2, 2, 2), np.nan), affine, "nan.nii.gz")
    assert "every voxel is NaN" in _error(empty, gradient_mT_per_m=1.0)
    plain = _map(tmp_path, np.zeros((2, 2, 2)), affine, "g.nii.gz")
    assert "nominal gradient not given" in _error(plain)
    table = _table(tmp_path, "x_mm\ty_mm\tz_mm\tbz_mT\n1\t2\t3\t4\n")
    assert "NIfTI field maps only" in _error(table, gradient_mT_per_m=1.0, table_position_mm=(0, 0, 0))
