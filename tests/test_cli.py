"""The command line (nl_unwarp.cli): exit codes, one-line errors, complete-or-nothing outputs,
and what each command writes.

Exit codes are the CLI's contract (0 done, 1 failure with a one-line message naming the
file and the field, 2 usage error from argparse). What the commands write is checked
against references outside the project:

* the harmonic series evaluated directly with ``scipy.special.lpmv`` (which includes the
  Condon-Shortley phase, scipy documentation) and the Schmidt normalisation of
  CONVENTIONS.md section 2 (Winch et al. 2005);
* the ITK field read back by SimpleITK, with its voxel positions from SimpleITK's own
  geometry (LPS, CONVENTIONS.md section 4);
* resampling with ``scipy.ndimage.map_coordinates``.

Most runs are in-process (``main(argv)`` with capsys); a few are subprocesses, through
``python -m nl_unwarp`` and the ``nl-unwarp`` script of the environment.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
import shutil
import subprocess
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
import SimpleITK as sitk
from clirun import run_main as _run
from scipy import ndimage
from scipy.special import lpmv

from nl_unwarp.api import displacement_table
from nl_unwarp.demo import demo_coil_path
from nl_unwarp.io.coilfile import load_coil

#: The warp is held to 1e-3 mm of direct evaluation (nl_unwarp.warp.DEFAULT_TOLERANCE_MM)
#: and stored as float32 (~1e-7 relative of a few mm): 2e-3 mm bounds both.
FIELD_ATOL_MM = 2e-3
#: Jacobian determinant: lattice interpolation (reported ~1e-5 on these grids) plus the
#: O(h^2) error of the central differences of the reference (h = 0.05 mm: ~1e-8).
JACOBIAN_ATOL = 1e-4
#: Finite-difference step of the reference Jacobian, mm.
FD_STEP_MM = 0.05
#: Integer outputs: ours and the scipy reference agree to float32 rounding; a value
#: within that of a half-integer may round either way: one unit.
INT_ATOL = 1
#: Float outputs of the resampling against scipy (float32 rounding of values ~1e3).
FLOAT_ATOL = 2e-3
#: The describe table prints three decimals; our value and the direct one may fall
#: on either side of a rounding boundary: one unit of the last place, plus float slack.
TABLE_ATOL_MM = 1.0e-3 + 1e-9
#: Imported model against the direct series: the same sums in a different order (mm).
IMPORT_ATOL_MM = 1e-9
#: The demo's valid radius, mm (nl_unwarp/data/demo_coil.json).
DEMO_VALID_RADIUS_MM = 220.0
#: diag(-1, -1, 1): RAS <-> LPS (DICOM PS3.3 C.7.6.2.1.1 against NIfTI-1).
LPS_FROM_RAS = np.diag([-1.0, -1.0, 1.0])
#: A device offset (mm) that makes the frame non-trivial; for HFS the device frame is
#: the patient LPS frame plus this offset (CONVENTIONS.md section 1, from memory).
OFFSET_MM = (6.0, -4.0, 12.0)
OFFSET_ARGS = ["--isocenter-offset", *(str(v) for v in OFFSET_MM)]
PARTIAL = ".partial-"


# Direct evaluation of the harmonic series (the reference for what the CLI writes).

def _schmidt_no_cs(n: int, m: int) -> float:
    """Factor taking scipy's lpmv (with the Condon-Shortley phase) to Schmidt without it."""
    norm = math.sqrt((2 - (m == 0)) * math.factorial(n - m) / math.factorial(n + m))
    return norm * (-1) ** m


def _series(axis_doc: dict, points_mm: np.ndarray, factor, scale: float = 1.0) -> np.ndarray:
    """R0 * sum scale * c_nm (rho/R0)^n factor(n, m) lpmv(m, n, cos theta) trig(m phi)."""
    r0 = axis_doc["reference_radius_mm"]
    x, y, z = np.moveaxis(points_mm, -1, 0)
    rho = np.sqrt(x**2 + y**2 + z**2)
    cos_t, phi = z / rho, np.arctan2(y, x)
    total = np.zeros(rho.shape)
    for kind, trig in (("cos", np.cos), ("sin", np.sin)):
        for n, m, value in axis_doc.get(kind, []):
            total += (scale * value * (rho / r0) ** n * factor(n, m) * lpmv(m, n, cos_t)
                      * trig(m * phi))
    return r0 * total


def _direct_encoded(doc: dict, points_device_mm: np.ndarray) -> np.ndarray:
    """Encoded positions u(r), device mm, of a Schmidt (no phase) coil document."""
    return np.stack([_series(doc["axes"][a], points_device_mm, _schmidt_no_cs) for a in "xyz"], -1)


def _direct_jacobian_det(doc: dict, point_device_mm: np.ndarray) -> float:
    """det(du/dr) by central differences of the direct series."""
    steps = np.eye(3) * FD_STEP_MM
    cols = [(_direct_encoded(doc, point_device_mm + s) - _direct_encoded(doc, point_device_mm - s))
            / (2 * FD_STEP_MM) for s in steps]
    return float(np.linalg.det(np.stack(cols, -1)))


def _demo_doc() -> dict:
    return json.loads(demo_coil_path().read_text())


# Files and runs.

def _affine(shape, zooms_mm, centre_ras_mm=(3.0, -5.0, 8.0)) -> np.ndarray:
    affine = np.diag(list(zooms_mm) + [1.0])
    affine[:3, 3] = np.asarray(centre_ras_mm) - np.asarray(zooms_mm) * (np.asarray(shape[:3]) - 1) / 2
    return affine


def _save(path: Path, data: np.ndarray, affine: np.ndarray, *, codes=(1, 1)) -> Path:
    img = nib.Nifti1Image(data, affine)
    img.set_qform(affine if codes[0] else None, code=codes[0])
    img.set_sform(affine if codes[1] else None, code=codes[1])
    nib.save(img, str(path))
    return path


def _smooth(rng, shape, mean=1000.0, spread=300.0) -> np.ndarray:
    vol = ndimage.gaussian_filter(rng.normal(size=shape), 1.5, mode="wrap")
    return mean + spread * vol / np.abs(vol).max()


def _entries(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir()) if folder.exists() else []


def _assert_one_line_error(err: str, *needles: str) -> None:
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("nl-unwarp: error: ")
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])


def _cli_script() -> list[str]:
    """The environment's ``nl-unwarp`` script, else ``python -m nl_unwarp``."""
    script = Path(sys.executable).parent / "nl-unwarp"
    return [str(script)] if script.exists() else [sys.executable, "-m", "nl_unwarp"]


def _subprocess(cmd, cwd) -> subprocess.CompletedProcess:
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=300)


@pytest.fixture
def image_path(tmp_path, rng) -> Path:
    """A small float32 image, 6 mm voxels, 130 mm across (all inside the valid radius)."""
    shape = (22, 20, 16)
    return _save(tmp_path / "raw.nii", _smooth(rng, shape).astype(np.float32), _affine(shape, (6, 6, 6)))


@pytest.fixture
def outdir(tmp_path) -> Path:
    folder = tmp_path / "out"
    folder.mkdir()
    return folder


# Exit code 2: usage errors (argparse).

@pytest.mark.parametrize("argv", [
    [],
    ["warp"],
    ["warp", "raw.nii", "--coil", "c.json"],  # --out-field is required
    ["correct", "raw.nii"],
    ["correct", "raw.nii", "out.nii", "--coil", "c.json", "--order", "7"],
    ["correct", "raw.nii", "out.nii", "--coil", "c.json", "--mode", "sideways"],
    ["warp", "raw.nii", "--coil", "c.json", "--out-field", "f.nii", "--table-position", "1", "2"],
    ["import", "t.tsv", "c.json", "--normalisation", "schmidt"],
    ["describe"],
])
def test_usage_errors_exit_2_and_write_nothing(argv, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    code, out, err = _run(argv, capsys)
    assert code == 2
    assert "usage:" in err and "error:" in err
    assert out == ""
    assert _entries(tmp_path) == []


def test_version_exits_0(capsys):
    code, out, _ = _run(["--version"], capsys)
    assert code == 0
    assert re.fullmatch(r"nl-unwarp \d+\.\d+\.\d+\S*\n", out)


# Exit code 1: bad images.

def _bad_image(kind: str, folder: Path, rng) -> tuple[Path, str]:
    """Write a broken image of ``kind``; return its path and a word the message must hold."""
    shape = (8, 7, 6)
    affine = _affine(shape, (5, 5, 5))
    data = _smooth(rng, shape).astype(np.float32)
    path = folder / f"{kind}.nii"
    if kind == "garbage":
        path.write_bytes(bytes(rng.integers(0, 256, 2000, dtype=np.uint8)))
        return path, "unreadable"
    if kind == "empty":
        path.write_bytes(b"")
        return path, "unreadable"
    if kind == "truncated":
        full = _save(folder / "full.nii", data, affine).read_bytes()
        path.write_bytes(full[: len(full) - 700])
        return path, "truncated"
    if kind == "truncated_gz":
        path = folder / "truncated_gz.nii.gz"
        noisy = rng.normal(size=(30, 30, 30)).astype(np.float32)  # incompressible: a long stream
        full = _save(folder / "full.nii.gz", noisy, _affine(noisy.shape, (5, 5, 5))).read_bytes()
        path.write_bytes(full[: len(full) // 2])
        return path, "truncated"
    if kind == "no_affine":
        return _save(path, data, affine, codes=(0, 0)), "qform_code and sform_code"
    if kind == "degenerate":
        flat = affine.copy()
        flat[:3, 2] = 0.0  # the third voxel axis has no extent
        img = nib.Nifti1Image(data, None)
        img.set_qform(None, code=0)
        img.set_sform(flat, code=1)
        nib.save(img, str(path))
        return path, "degenerate"
    if kind == "five_d":
        return _save(path, np.zeros((4, 4, 4, 2, 2), np.float32), affine), "5-D"
    if kind == "missing":
        return path, "not found"
    raise AssertionError(kind)


BAD_IMAGES = ["garbage", "empty", "truncated", "truncated_gz", "no_affine", "degenerate", "five_d",
              "missing"]


@pytest.mark.parametrize("kind", BAD_IMAGES)
def test_bad_image_fails_with_one_line_and_leaves_nothing(kind, tmp_path, outdir, rng, capsys):
    src, word = _bad_image(kind, tmp_path, rng)
    code, out, err = _run(["--quiet", "correct", src, outdir / "corrected.nii", "--coil", demo_coil_path(),
                           *OFFSET_ARGS, "--out-field", outdir / "field.nii",
                           "--out-jacobian", outdir / "jac.nii", "--out-summary", outdir / "s.json"],
                          capsys)
    assert code == 1
    _assert_one_line_error(err, str(src), word)
    assert _entries(outdir) == []


@pytest.mark.parametrize("kind", ["truncated", "no_affine"])
def test_warp_command_reports_bad_images_too(kind, tmp_path, outdir, rng, capsys):
    src, word = _bad_image(kind, tmp_path, rng)
    code, _, err = _run(["--quiet", "warp", src, "--coil", demo_coil_path(), *OFFSET_ARGS,
                         "--out-field", outdir / "field.nii", "--out-mask", outdir / "mask.nii"], capsys)
    assert code == 1
    _assert_one_line_error(err, str(src), word)
    assert _entries(outdir) == []


# Exit code 1: bad coil model files.

def _edit_demo(edit) -> str:
    doc = _demo_doc()
    edit(doc)
    return json.dumps(doc, indent=1)


BAD_COILS = {
    "unknown_top_key": (lambda: _edit_demo(lambda d: d.update(colour="blue")), "unknown key 'colour'"),
    "unknown_axis_key": (lambda: _edit_demo(lambda d: d["axes"]["x"].update(gain=2.0)),
                         "unknown key 'axes.x.gain'"),
    "missing_axis": (lambda: _edit_demo(lambda d: d["axes"].pop("y")), "axis 'y' missing"),
    # json.dumps writes float("nan") as the bare token NaN, which JSON does not allow.
    "nan_value": (lambda: _edit_demo(lambda d: d["axes"]["z"]["cos"][1].__setitem__(2, float("nan"))),
                  "NaN"),
    "missing_radius": (lambda: _edit_demo(lambda d: d["axes"]["x"].pop("reference_radius_mm")),
                       "axis x: key 'reference_radius_mm'"),
    "missing_file": (None, "coil model file not found"),
}


@pytest.mark.parametrize("kind", sorted(BAD_COILS))
def test_bad_coil_fails_with_one_line_and_leaves_nothing(kind, tmp_path, outdir, image_path, capsys):
    make, word = BAD_COILS[kind]
    coil = tmp_path / f"{kind}.json"
    if make is not None:
        coil.write_text(make())
    code, _, err = _run(["--quiet", "correct", image_path, outdir / "corrected.nii", "--coil", coil,
                         *OFFSET_ARGS, "--out-field", outdir / "field.nii"], capsys)
    assert code == 1
    _assert_one_line_error(err, str(coil), word)
    assert _entries(outdir) == []


def test_describe_reports_a_bad_coil(tmp_path, capsys):
    coil = tmp_path / "c.json"
    coil.write_text(BAD_COILS["missing_axis"][0]())
    code, out, err = _run(["describe", coil], capsys)
    assert code == 1 and out == ""
    _assert_one_line_error(err, str(coil), "axis 'y' missing")


def test_failure_while_writing_leaves_no_partial_files(tmp_path, outdir, image_path, capsys):
    # The corrected image and the field are written (as temporaries) before the summary's
    # folder turns out to be a file: the whole set must be discarded.
    (outdir / "sub").write_text("not a folder")
    code, _, err = _run(["--quiet", "correct", image_path, outdir / "corrected.nii",
                         "--coil", demo_coil_path(), *OFFSET_ARGS, "--out-field", outdir / "field.nii",
                         "--out-summary", outdir / "sub" / "summary.json"], capsys)
    assert code == 1
    _assert_one_line_error(err, str(outdir / "sub"))
    assert _entries(outdir) == ["sub"]


# warp: every product, against SimpleITK geometry and the direct series.

def test_warp_writes_field_jacobian_magnitude_mask_summary(image_path, outdir, capsys, rng):
    paths = {k: outdir / f"{k}.nii" for k in ("field", "jacobian", "magnitude", "mask")}
    paths["summary"] = outdir / "summary.json"
    # --field-margin 0: the field on the image's own grid, voxel for voxel (the default adds a margin).
    code, out, err = _run(["warp", image_path, "--coil", demo_coil_path(), *OFFSET_ARGS,
                           "--field-margin", "0",
                           *[a for k, p in paths.items() for a in (f"--out-{k}", p)]], capsys)
    assert code == 0, err
    assert f"wrote            {paths['field']}" in out
    assert _entries(outdir) == sorted(p.name for p in paths.values())

    doc = _demo_doc()
    field = sitk.ReadImage(str(paths["field"]), sitk.sitkVectorFloat64)
    shape = nib.load(str(image_path)).shape
    assert field.GetSize() == shape and field.GetNumberOfComponentsPerPixel() == 3
    jac = np.asarray(nib.load(str(paths["jacobian"])).dataobj)
    picks = [tuple(int(rng.integers(0, n)) for n in shape) for _ in range(6)] + [(0, 0, 0)]
    for ijk in picks:
        # SimpleITK's physical point is LPS; for HFS the device frame is LPS + offset, and
        # the field's LPS vector is the device displacement (CONVENTIONS.md sections 1, 4).
        r_device = np.array(field.TransformIndexToPhysicalPoint(ijk)) + OFFSET_MM
        expected = _direct_encoded(doc, r_device) - r_device
        np.testing.assert_allclose(field.GetPixel(ijk), expected, atol=FIELD_ATOL_MM)
        assert abs(jac[ijk] - _direct_jacobian_det(doc, r_device)) < JACOBIAN_ATOL

    vectors = np.asarray(nib.load(str(paths["field"])).dataobj)[:, :, :, 0, :]
    magnitude = np.asarray(nib.load(str(paths["magnitude"])).dataobj)
    np.testing.assert_allclose(magnitude, np.linalg.norm(vectors, axis=-1), rtol=1e-6, atol=1e-7)
    mask = nib.load(str(paths["mask"]))
    assert mask.get_data_dtype() == np.uint8 and not np.asarray(mask.dataobj).any()

    summary = json.loads(paths["summary"].read_text())
    assert summary["mode"] == "full" and summary["outside_valid_fraction"] == 0.0
    assert summary["coil_model"]["sha256"] == hashlib.sha256(demo_coil_path().read_bytes()).hexdigest()
    # Isocenter in world: r_device = 0 at p_lps = -offset (HFS), RAS = diag(-1, -1, 1) p_lps.
    np.testing.assert_allclose(summary["isocenter_ras_mm"], LPS_FROM_RAS @ -np.array(OFFSET_MM))
    assert summary["displacement_max_mm"] == pytest.approx(float(magnitude.max()), rel=1e-6)


def test_outside_valid_radius_warns_writes_mask_and_succeeds(tmp_path):
    # 25 mm voxels, 300 mm across: the corners lie beyond the demo's 220 mm.
    shape = (12, 12, 12)
    affine = _affine(shape, (25, 25, 25), centre_ras_mm=(0, 0, 0))
    src = _save(tmp_path / "big.nii", np.ones(shape, np.float32), affine)
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1)
    ras = ijk @ affine[:3, :3].T + affine[:3, 3]
    expected = np.linalg.norm(ras @ LPS_FROM_RAS.T, axis=-1) > DEMO_VALID_RADIUS_MM  # HFS, no offset
    assert 0 < expected.mean() < 1
    proc = _subprocess([*_cli_script(), "warp", str(src), "--coil", str(demo_coil_path()),
                        "--isocenter-offset", "0", "0", "0", "--out-field", "field.nii",
                        "--out-mask", "mask.nii"], tmp_path)
    assert proc.returncode == 0, proc.stderr
    warning = [ln for ln in proc.stderr.splitlines() if "warning" in ln]
    assert len(warning) == 1 and str(src) in warning[0]
    assert f"{100 * expected.mean():.1f} %" in warning[0] and "valid radius" in warning[0]
    mask = np.asarray(nib.load(str(tmp_path / "mask.nii")).dataobj)
    np.testing.assert_array_equal(mask.astype(bool), expected)


# correct: integers with --keep-dtype, 3-D and 4-D; the through-plane mode.

def _reference_correction(raw: np.ndarray, affine: np.ndarray, field_path: Path, jac_path: Path,
                          order: int = 3) -> np.ndarray:
    """scipy.ndimage resampling of each volume at p + d(p), times the Jacobian; 0 outside."""
    lps = np.asarray(nib.load(str(field_path)).dataobj)[:, :, :, 0, :].astype(float)
    disp_ras = lps @ LPS_FROM_RAS.T  # CONVENTIONS.md section 4: the file's vectors are LPS
    jac = np.asarray(nib.load(str(jac_path)).dataobj).astype(float)
    shape = disp_ras.shape[:3]
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1).astype(float)
    coords = np.moveaxis(ijk + disp_ras @ np.linalg.inv(affine[:3, :3]).T, -1, 0)
    inside = np.all([(coords[a] >= -0.5) & (coords[a] <= n - 0.5) for a, n in enumerate(shape)], 0)
    vols = raw[..., None] if raw.ndim == 3 else raw
    out = np.stack([np.where(inside, ndimage.map_coordinates(vols[..., t].astype(float), coords,
                                                             order=order, mode="mirror") * jac, 0.0)
                    for t in range(vols.shape[3])], -1)
    return out[..., 0] if raw.ndim == 3 else out


@pytest.mark.parametrize("volumes", [None, 3])
def test_correct_int16_keep_dtype_3d_and_4d(volumes, tmp_path, outdir, rng, capsys):
    # 8 mm voxels, 190 mm across: displacements up to ~1.5 mm, a fifth of a voxel.
    shape = (24, 22, 18) + ((volumes,) if volumes else ())
    affine = _affine(shape, (8, 8, 8))
    raw = np.round(_smooth(rng, shape, mean=1500.0, spread=1200.0)).astype(np.int16)
    src = _save(tmp_path / "raw.nii.gz", raw, affine)
    code, out, err = _run(["--quiet", "correct", src, outdir / "corrected.nii.gz", "--coil",
                           demo_coil_path(), *OFFSET_ARGS, "--keep-dtype", "--field-margin", "0",
                           "--out-field", outdir / "field.nii", "--out-jacobian", outdir / "jac.nii"],
                          capsys)
    assert code == 0, err
    img = nib.load(str(outdir / "corrected.nii.gz"))
    assert img.get_data_dtype() == np.int16 and img.shape == shape
    np.testing.assert_allclose(img.affine, affine)
    got = np.asarray(img.dataobj)
    ref = _reference_correction(raw, affine, outdir / "field.nii", outdir / "jac.nii")
    expected = np.clip(np.rint(ref), -32768, 32767)
    assert np.abs(got.astype(int) - expected).max() <= INT_ATOL
    assert np.abs(got.astype(int) - raw).max() > 10  # the correction did something
    assert _entries(outdir) == ["corrected.nii.gz", "field.nii", "jac.nii"]


def test_correct_throughplane_keeps_only_the_slice_normal(tmp_path, outdir, rng, capsys):
    # Anisotropic: 10 mm slices along k, so the default slice axis is k (largest spacing).
    shape = (20, 20, 10)
    affine = _affine(shape, (6, 6, 10))
    raw = _smooth(rng, shape).astype(np.float32)
    src = _save(tmp_path / "raw.nii", raw, affine)
    code, _, err = _run(["--quiet", "correct", src, outdir / "corrected.nii", "--coil", demo_coil_path(),
                         *OFFSET_ARGS, "--mode", "throughplane", "--field-margin", "0",
                         "--out-field", outdir / "field.nii",
                         "--out-jacobian", outdir / "jac.nii", "--out-summary", outdir / "s.json"], capsys)
    assert code == 0, err
    summary = json.loads((outdir / "s.json").read_text())
    assert summary["mode"] == "throughplane" and summary["slice_axis"] == 2
    field = sitk.ReadImage(str(outdir / "field.nii"), sitk.sitkVectorFloat64)
    vectors = sitk.GetArrayFromImage(field)  # (Z, Y, X, 3), LPS
    # Axis-aligned slices: the normal is LPS z; in-plane components are removed exactly.
    assert not vectors[..., :2].any()
    doc = _demo_doc()
    for ijk in [(0, 0, 0), (19, 3, 9), (7, 15, 4)]:
        r_device = np.array(field.TransformIndexToPhysicalPoint(ijk)) + OFFSET_MM
        expected_z = (_direct_encoded(doc, r_device) - r_device)[2]
        assert abs(field.GetPixel(ijk)[2] - expected_z) < FIELD_ATOL_MM
    got = np.asarray(nib.load(str(outdir / "corrected.nii")).dataobj)
    ref = _reference_correction(raw, affine, outdir / "field.nii", outdir / "jac.nii")
    np.testing.assert_allclose(got, ref, atol=FLOAT_ATOL)


# describe, import, demo.

def _fibonacci_directions(points: int) -> np.ndarray:
    """The Fibonacci sphere that displacement_table documents (golden-angle spiral)."""
    k = np.arange(points) + 0.5
    polar = np.arccos(1 - 2 * k / points)
    azimuth = np.pi * (1 + 5**0.5) * k
    return np.stack([np.sin(polar) * np.cos(azimuth), np.sin(polar) * np.sin(azimuth), np.cos(polar)], -1)


def _table_rows(out: str) -> list[list[str]]:
    return [ln.split() for ln in out.splitlines() if re.match(r"\s+\d+\s+\d+\.\d{3}\s+\d+\.\d{3}", ln)]


def test_describe_prints_the_displacement_table(capsys):
    code, out, _ = _run(["describe", demo_coil_path()], capsys)
    assert code == 0
    assert hashlib.sha256(demo_coil_path().read_bytes()).hexdigest() in out
    rows = _table_rows(out)
    assert [float(r[0]) for r in rows] == [50.0, 100.0, 150.0, 200.0]
    table = displacement_table(load_coil(demo_coil_path()))
    doc = _demo_doc()
    directions = _fibonacci_directions(4000)
    for row, entry in zip(rows, table, strict=True):
        assert row[1:3] == [f"{entry['max_mm']:.3f}", f"{entry['rms_mm']:.3f}"]
        assert len(row) == 3  # all inside the 220 mm valid radius: no flag
        # Independent: the direct series on the same directions.
        points = directions * float(row[0])
        mag = np.linalg.norm(_direct_encoded(doc, points) - points, axis=-1)
        assert abs(float(row[1]) - mag.max()) <= TABLE_ATOL_MM
        assert abs(float(row[2]) - np.sqrt(np.mean(mag**2))) <= TABLE_ATOL_MM
    # The largest displacement grows with the radius (odd-degree terms from n = 3 on).
    assert np.all(np.diff([float(r[1]) for r in rows]) > 0)


def test_describe_flags_radii_beyond_the_valid_radius(tmp_path, capsys):
    doc = _demo_doc()
    for axis in doc["axes"].values():
        axis["valid_radius_mm"] = 120.0
    coil = tmp_path / "short.json"
    coil.write_text(json.dumps(doc))
    code, out, _ = _run(["describe", coil], capsys)
    assert code == 0
    flagged = {ln.split()[0]: "beyond valid radius" in ln for ln in out.splitlines()
               if re.match(r"\s+\d+\s+\d", ln)}
    assert flagged == {"50": False, "100": False, "150": True, "200": True}
    code, out, _ = _run(["describe", "--json", coil], capsys)
    assert code == 0
    info = json.loads(out)
    assert [r["inside_valid_radius"] for r in info["displacement"]] == [True, True, False, False]
    assert info["valid_radius_mm"] == 120.0


#: Gradient strength and reference radius of the imported table (invented numbers).
IMPORT_G_MT_PER_M = 40.0
IMPORT_R0_MM = 200.0
#: Field coefficients, mT, in the unnormalised basis with the (-1)^m phase, that is,
#: multiplying scipy's lpmv directly. With the phase, P_1^1 = -sin(theta): the linear
#: x and y terms are negative. Linear terms are G * R0 = 8 mT (alpha = A / (G R0) = 1).
IMPORT_ROWS = [("x", 1, 1, "cos", -8.0), ("y", 1, 1, "sin", -8.0), ("z", 1, 0, "cos", 8.0),
               ("x", 3, 1, "cos", 0.12), ("x", 3, 3, "cos", -0.004), ("y", 3, 1, "sin", 0.1),
               ("y", 3, 3, "sin", 0.003), ("z", 3, 0, "cos", -0.4), ("z", 3, 2, "sin", 0.02)]


def test_import_tsv_converts_units_and_basis(tmp_path, capsys, rng):
    table = tmp_path / "coeffs.tsv"
    table.write_text("axis\tdegree\torder\tkind\tvalue\n"
                     + "".join(f"{a}\t{n}\t{m}\t{k}\t{v}\n" for a, n, m, k, v in IMPORT_ROWS))
    out_path = tmp_path / "models" / "imported.json"
    code, out, err = _run(["import", table, out_path, "--normalisation", "unnormalised",
                           "--condon-shortley", "--reference-radius-mm", IMPORT_R0_MM,
                           "--valid-radius-mm", 180, "--gradient-mT-per-m", IMPORT_G_MT_PER_M,
                           "--label", "Invented import"], capsys)
    assert code == 0, err
    assert out.strip() == f"wrote {out_path} (degree 3)"
    assert _entries(out_path.parent) == ["imported.json"]
    doc = json.loads(out_path.read_text())
    scale = 1.0 / (IMPORT_G_MT_PER_M * IMPORT_R0_MM / 1000.0)  # alpha = A / (G R0), R0 in m
    for a, n, m, kind, value in IMPORT_ROWS:
        # Schmidt without the phase: P = (-1)^m Pbar / sqrt((2 - d_m0)(n-m)!/(n+m)!).
        expected = scale * value * (-1) ** m / math.sqrt((2 - (m == 0)) * math.factorial(n - m)
                                                         / math.factorial(n + m))
        stored = {(t[0], t[1]): t[2] for t in doc["axes"][a][kind]}
        assert stored[(n, m)] == pytest.approx(expected, rel=1e-12)
    # The model encodes what the table's series says, evaluated with scipy's lpmv as is.
    points = rng.uniform(-120, 120, size=(20, 3))
    table_axes = {a: {"reference_radius_mm": IMPORT_R0_MM,
                      "cos": [(n, m, v) for b, n, m, k, v in IMPORT_ROWS if b == a and k == "cos"],
                      "sin": [(n, m, v) for b, n, m, k, v in IMPORT_ROWS if b == a and k == "sin"]}
                  for a in "xyz"}
    direct = np.stack([_series(table_axes[a], points, lambda n, m: 1.0, scale) for a in "xyz"], -1)
    encoded, _ = load_coil(out_path).encode(points, jacobian=False)
    np.testing.assert_allclose(encoded, direct, atol=IMPORT_ATOL_MM)


@pytest.mark.parametrize(("content", "words"), [
    (None, ["table file not found"]),
    ("axis\tdegree\torder\tkind\tvalue\nx\t1\t1\tcos\t1\ny\t1\t1\tsin\t1\nz\t1\t0\tcos\t1\n"
     "x\t3\t1\tcos\tnan\n", ["axis x", "key 'cos'", "n=3 m=1", "not finite"]),
    ("axis\tdegree\torder\tkind\tvalue\nw\t1\t1\tcos\t1\n", ["line 2", "axis must be x, y or z"]),
    ("axis,n,m,kind,value\nx,1,1,cos,1\n", ["header must be"]),
])
def test_import_errors_name_file_and_field(content, words, tmp_path, outdir, capsys):
    table = tmp_path / "t.tsv"
    if content is not None:
        table.write_text(content)
    code, out, err = _run(["import", table, outdir / "c.json", "--normalisation", "schmidt",
                           "--reference-radius-mm", 250, "--valid-radius-mm", 200], capsys)
    assert code == 1 and out == ""
    _assert_one_line_error(err, str(table), *words)
    assert _entries(outdir) == []


# Subprocesses: the module entry point and the script.

def test_module_entry_point_usage_error(tmp_path):
    proc = _subprocess([sys.executable, "-m", "nl_unwarp"], tmp_path)
    assert proc.returncode == 2 and "usage:" in proc.stderr


@pytest.mark.skipif(shutil.which("nl-unwarp", path=str(Path(sys.executable).parent)) is None,
                    reason="no nl-unwarp script beside this interpreter (package not installed)")
def test_script_failure_is_one_line(tmp_path):
    missing = tmp_path / "nowhere.json"
    proc = _subprocess([*_cli_script(), "describe", str(missing)], tmp_path)
    assert proc.returncode == 1 and proc.stdout == ""
    _assert_one_line_error(proc.stderr, str(missing), "not found")


@pytest.mark.slow
def test_demo_reduces_the_marker_error(tmp_path):
    proc = _subprocess([sys.executable, "-m", "nl_unwarp", "--quiet", "demo", "--phantom-only",
                        str(tmp_path / "demo")], tmp_path)
    assert proc.returncode == 0, proc.stderr
    rows = {}
    for label in ("marker error max", "marker error mean"):
        line = next(ln for ln in proc.stdout.splitlines() if ln.startswith(label))
        rows[label] = [float(v) for v in line[len(label):].split()[:2]]
    for before, after in rows.values():
        assert after < before
    assert "FICTIONAL" in proc.stdout
    assert (tmp_path / "demo" / "phantom_corrected.nii.gz").exists()
    assert not [p for p in (tmp_path / "demo").rglob("*") if PARTIAL in p.name]
