"""Library entry points (nl_unwarp.api): where the device frame comes from, and the summary.

References: the frame relation of CONVENTIONS.md section 1 (``r_device = R D p_ras + t``
with ``D = diag(-1, -1, 1)``, DICOM PS3.3 C.7.6.2.1.1, and R from the patient-position
table there, from memory); the one documented BIDS TablePosition case quoted there;
``hashlib.sha256`` (FIPS 180-4) for the coil provenance.
"""

from __future__ import annotations

import hashlib
import json
import logging
import shutil

import nibabel as nib
import numpy as np
import pytest
from sampling import oblique_affine, sitk_points

from nl_unwarp.api import FrameSpec, WarpOutputs, correct_file, make_frame, warp_file, warp_summary
from nl_unwarp.demo import demo_coil_path
from nl_unwarp.errors import InputError
from nl_unwarp.frames import offset_from_table_position
from nl_unwarp.warp import DEFAULT_TOLERANCE_MM, compute_warp

#: Frame arithmetic is a few products of exact small integers and the inputs: 1e-12 mm.
FRAME_ATOL_MM = 1e-12
#: D = diag(-1, -1, 1), LPS <-> RAS (DICOM PS3.3 C.7.6.2.1.1 against NIfTI-1).
D = np.diag([-1.0, -1.0, 1.0])
#: R (device = R p_lps) for feet-first supine, CONVENTIONS.md section 1 (from memory).
R_FFS = np.diag([-1.0, 1.0, -1.0])
#: Words that make the coil path identifiable; none may reach the summary.
SECRET_FOLDER = "site-vault-7f3a"
SECRET_NAME = "gradient_model_room2.json"
ZERO_WARNING = "no table position or isocenter offset given"


def _warnings(caplog) -> list[str]:
    return [r.getMessage() for r in caplog.records if r.levelno >= logging.WARNING]


def test_isocenter_offset_wins_over_table_position(caplog):
    caplog.set_level(logging.WARNING, logger="nl_unwarp")
    frame, origin = make_frame(FrameSpec("HFS", table_position_mm=(1.0, 2.0, -300.0),
                                         isocenter_offset_mm=(4.0, -5.0, 6.0)))
    assert origin == "isocenter offset given"
    np.testing.assert_array_equal(frame.isocenter_offset_mm, [4.0, -5.0, 6.0])
    assert _warnings(caplog) == []


def test_table_position_is_used_when_no_offset(caplog):
    caplog.set_level(logging.WARNING, logger="nl_unwarp")
    # The documented case (CONVENTIONS.md section 1): table 2 cm toward the feet of a
    # head-first-supine patient, TablePosition [0, 0, -20], device offset z = -20.
    frame, origin = make_frame(FrameSpec("HFS", table_position_mm=(0.0, 0.0, -20.0)))
    assert origin == "table position"
    np.testing.assert_array_equal(frame.isocenter_offset_mm, [0.0, 0.0, -20.0])
    # All three values go through the table conversion (its signs are test_frames' subject).
    frame, _ = make_frame(FrameSpec("HFP", table_position_mm=(3.0, -7.0, 11.0)))
    np.testing.assert_array_equal(frame.isocenter_offset_mm, offset_from_table_position((3.0, -7.0, 11.0)))
    assert _warnings(caplog) == []


def test_no_offset_and_no_table_gives_zeros_and_a_warning(caplog):
    caplog.set_level(logging.WARNING, logger="nl_unwarp")
    frame, origin = make_frame(FrameSpec("HFS"))
    assert origin == "default (zeros)"
    np.testing.assert_array_equal(frame.isocenter_offset_mm, [0.0, 0.0, 0.0])
    messages = _warnings(caplog)
    assert len(messages) == 1 and ZERO_WARNING in messages[0]


@pytest.mark.parametrize("spec", [
    FrameSpec("HFS", table_position_mm=(0.0, float("nan"), 0.0)),
    FrameSpec("HFS", isocenter_offset_mm=(0.0, 0.0, float("inf"))),
    FrameSpec("SITTING"),
])
def test_bad_frame_values_raise_input_error_naming_the_options(spec):
    with pytest.raises(InputError) as info:
        make_frame(spec)
    assert "--position/--table-position/--isocenter-offset" in str(info.value)


def _grid(shape=(14, 12, 10), zooms=(8.0, 8.0, 8.0), centre=(10.0, -6.0, 4.0)) -> np.ndarray:
    affine = np.diag(list(zooms) + [1.0])
    affine[:3, 3] = np.asarray(centre) - np.asarray(zooms) * (np.asarray(shape) - 1) / 2
    return affine


def test_summary_isocenter_is_the_frames_and_follows_the_conventions(demo_coil):
    offset = np.array([10.0, -20.0, 30.0])
    frame, origin = make_frame(FrameSpec("FFS", isocenter_offset_mm=tuple(offset)))
    shape = (14, 12, 10)
    warp = compute_warp(demo_coil, shape, _grid(shape), frame)
    summary = warp_summary(warp, demo_coil, None, frame, origin)
    np.testing.assert_array_equal(summary["isocenter_ras_mm"], frame.isocenter_ras_mm)
    # Independently: r_device = R D p + t = 0  =>  p = D R^T (-t)  (R, D orthogonal, diagonal).
    np.testing.assert_allclose(summary["isocenter_ras_mm"], D @ R_FFS.T @ -offset, atol=FRAME_ATOL_MM)
    assert summary["patient_position"] == "FFS"
    assert summary["isocenter_offset_mm"] == offset.tolist()
    assert summary["isocenter_offset_from"] == "isocenter offset given"
    assert summary["coil_model"]["sha256"] is None  # a model object has no file to hash
    assert summary["interpolation_error_mm"] == warp.interpolation_error_mm <= DEFAULT_TOLERANCE_MM
    assert summary["displacement_max_mm"] == pytest.approx(float(warp.magnitude_mm.max()), rel=1e-7)
    assert summary["jacobian_min"] == float(warp.jacobian.min())
    json.dumps(summary, allow_nan=False)  # plain JSON: no numpy scalars, no NaN


@pytest.fixture
def secret_coil(tmp_path):
    folder = tmp_path / SECRET_FOLDER
    folder.mkdir()
    path = folder / SECRET_NAME
    shutil.copyfile(demo_coil_path(), path)
    return path


@pytest.fixture
def image(tmp_path, rng):
    shape = (14, 12, 10)
    affine = _grid(shape)
    img = nib.Nifti1Image(rng.normal(100.0, 10.0, size=shape).astype(np.float32), affine)
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    path = tmp_path / "raw.nii"
    nib.save(img, str(path))
    return path


def _assert_no_trace_of(text: str, coil_path) -> None:
    for word in (str(coil_path), str(coil_path.parent), SECRET_FOLDER, SECRET_NAME, "room2"):
        assert word not in text


def test_warp_file_summary_hashes_the_coil_and_hides_its_path(image, secret_coil, tmp_path, caplog):
    caplog.set_level(logging.WARNING, logger="nl_unwarp")
    out = WarpOutputs(field=tmp_path / "field.nii", summary=tmp_path / "summary.json")
    summary = warp_file(image, secret_coil, out, frame=FrameSpec("HFS", table_position_mm=(0, 0, 15)))
    assert summary["coil_model"]["sha256"] == hashlib.sha256(secret_coil.read_bytes()).hexdigest()
    written = (tmp_path / "summary.json").read_text()
    assert json.loads(written) == summary
    _assert_no_trace_of(written, secret_coil)
    _assert_no_trace_of(json.dumps(summary), secret_coil)
    assert summary["isocenter_offset_from"] == "table position"
    assert _warnings(caplog) == []


def test_summary_hash_follows_the_file_bytes_not_the_model(image, secret_coil, tmp_path):
    first = warp_file(image, secret_coil, WarpOutputs(), frame=FrameSpec(isocenter_offset_mm=(0, 0, 0)))
    # Same model, different bytes (a trailing newline): provenance must tell the files apart.
    secret_coil.write_bytes(secret_coil.read_bytes() + b"\n")
    second = warp_file(image, secret_coil, WarpOutputs(), frame=FrameSpec(isocenter_offset_mm=(0, 0, 0)))
    assert second["coil_model"]["sha256"] == hashlib.sha256(secret_coil.read_bytes()).hexdigest()
    assert first["coil_model"]["sha256"] != second["coil_model"]["sha256"]
    assert first["displacement_max_mm"] == second["displacement_max_mm"]


def test_correct_file_summary_hides_the_coil_path_too(image, secret_coil, tmp_path, caplog):
    caplog.set_level(logging.WARNING, logger="nl_unwarp")
    summary = correct_file(image, secret_coil, tmp_path / "corrected.nii",
                           warp_outputs=WarpOutputs(summary=tmp_path / "s.json"))
    written = (tmp_path / "s.json").read_text()
    _assert_no_trace_of(written, secret_coil)
    assert json.loads(written)["coil_model"]["sha256"] == hashlib.sha256(secret_coil.read_bytes()).hexdigest()
    assert summary["correction"] == {"order": 3, "jacobian": True, "fill": 0.0, "keep_dtype": False,
                                     "volumes": 1}
    # No frame given: zeros, said in the summary and warned about.
    assert summary["isocenter_offset_from"] == "default (zeros)"
    assert any(ZERO_WARNING in m for m in _warnings(caplog))


def test_coarse_field_of_an_oblique_slab_as_simpleitk_reads_it(tmp_path):
    """``field_spacing_mm`` on an oblique, anisotropic slab of 3 slices in through-plane mode:
    the field file (3 mm voxels, the slab's axes) read by SimpleITK's
    ``DisplacementFieldTransform`` (the outside reference for how ITK-style tools apply it) at
    every slab voxel matches the warp computed on the slab's own grid within the summary's
    reported deviation, which is small for this smooth coil (0.02 mm: common practice, no
    source), and the through-plane field stays along the slice normal."""
    import SimpleITK as sitk

    from nl_unwarp.compose import FIELD_MARGIN_MM
    from nl_unwarp.frames import DeviceFrame
    from nl_unwarp.io.coilfile import load_coil
    from nl_unwarp.warp import slice_normal_ras

    shape = (36, 30, 3)
    affine = oblique_affine(shape, (1.6, 1.8, 5.0), (0.0, 17.0, 0.0), (-1.8, 1.1, 36.6))
    nib.save(nib.Nifti1Image(np.ones(shape, np.float32), affine), tmp_path / "slab.nii.gz")
    offset = (5.0, -10.0, 30.0)
    summary = warp_file(tmp_path / "slab.nii.gz", demo_coil_path(),
                        WarpOutputs(field=tmp_path / "f.nii.gz", field_spacing_mm=3.0),
                        frame=FrameSpec(isocenter_offset_mm=offset), mode="throughplane")
    grid = summary["field_grid"]
    np.testing.assert_allclose(grid["spacing_mm"], 3.0, rtol=1e-12)
    assert grid["margin_mm"] == FIELD_MARGIN_MM and grid["deviation_max_mm"] < 0.02
    direct = compute_warp(load_coil(demo_coil_path()), shape, affine, DeviceFrame("HFS", offset),
                          mode="throughplane", slice_axis=2)
    assert np.abs(direct.disp_ras_mm).max() > 0.05  # a real through-plane displacement
    transform = sitk.DisplacementFieldTransform(
        sitk.ReadImage(str(tmp_path / "f.nii.gz"), sitk.sitkVectorFloat64))
    ijk = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij"), -1).reshape(-1, 3)
    points = ijk @ affine[:3, :3].T + affine[:3, 3]
    read = sitk_points(transform, points) - points
    exact = np.asarray(direct.disp_ras_mm).reshape(-1, 3)
    # 2e-5 mm: the file's float32 vectors.
    assert np.abs(read - exact).max() <= grid["deviation_max_mm"] + 2e-5
    normal = slice_normal_ras(affine, 2)
    off_normal = read - np.outer(read @ normal, normal)
    assert np.abs(off_normal).max() < 1e-4
