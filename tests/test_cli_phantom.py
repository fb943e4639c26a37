"""``nl-unwarp fit phantom`` end to end: simulated scans in, coil model, table and report out.

The scans are made with the Biot-Savart coil set of ``tests/coils.py`` (magpylib), the
outside reference: the written coil model (read back by the strict loader) must give the
Biot-Savart displacement over the phantom, and the summary the true pose. The report's
coil SHA-256 is checked with ``hashlib``. Bad input: one line naming the file or option,
exit 1, nothing written. The nipype Interface gives the same model as the command.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from clirun import run_main as _run
from phantomscan import ball_points, lattice_phantom, simulate_scan, true_displacement_mm
from scipy.spatial.transform import Rotation

from nl_unwarp.frames import DeviceFrame, offset_from_table_position
from nl_unwarp.interfaces.phantom import FitPhantom
from nl_unwarp.io.coilfile import load_coil

#: Targets of the issue (displacement RMS over the phantom, pose), mm and degrees.
DISPLACEMENT_RMS_TOL_MM = 0.2
POSE_TRANSLATION_TOL_MM = 0.1
POSE_ROTATION_TOL_DEG = 0.05
#: Two table positions, no true isocenter error: the fitted correction is zero within
#: this many of its reported standard errors. On this small phantom (markers within 80 mm,
#: where the coil is nearly linear) those are large (0.3-0.7 mm): the correction is seen
#: only through the gradient of the distortion.
ISOCENTER_SIGMAS = 4.0

ROTATION = Rotation.from_euler("xyz", [3.0, -2.0, 4.0], degrees=True)
TRANSLATION_RAS_MM = np.array([4.0, -6.0, 8.0])
TABLE_POSITIONS = ((0.0, 0.0, 0.0), (0.0, 0.0, 30.0))
BODY_RADIUS_MM = 95.0
MARKER_EXTENT_MM = 80.0


@pytest.fixture(scope="module")
def scans(tmp_path_factory):
    """A phantom definition file and two simulated scans (table at z = 0 and 30 mm)."""
    folder = tmp_path_factory.mktemp("phantom_scans")
    markers, diameters = lattice_phantom(20.0, MARKER_EXTENT_MM)
    doc = {"format": "nl_unwarp-phantom", "format_version": 1, "name": "Test lattice (fictional)",
           "body": {"shape": "sphere", "radius_mm": BODY_RADIUS_MM},
           "markers": [{"id": f"k{k}", "position_mm": p.tolist(), "diameter_mm": float(d)}
                       for k, (p, d) in enumerate(zip(markers, diameters, strict=True))]}
    definition = folder / "phantom.json"
    definition.write_text(json.dumps(doc), encoding="utf-8")
    images = []
    for k, tp in enumerate(TABLE_POSITIONS):
        frame = DeviceFrame("HFS", offset_from_table_position(tp))
        image, affine, _ = simulate_scan(markers, diameters, body_radius_mm=BODY_RADIUS_MM,
                                         rotation=ROTATION.as_matrix(), translation_ras_mm=TRANSLATION_RAS_MM,
                                         frame=frame, voxel_mm=2.5, fov_mm=210.0, noise_sigma=0.02,
                                         seed=100 + k)
        path = folder / f"scan{k}.nii.gz"
        nib.save(nib.Nifti1Image(image, affine), str(path))
        images.append(path)
    return {"definition": definition, "images": images, "markers": len(markers)}


def _volume_rms(coil, frame: DeviceFrame, rng) -> float:
    world = ROTATION.apply(ball_points(rng, 3000, MARKER_EXTENT_MM)) + TRANSLATION_RAS_MM
    dev = frame.to_device(world)
    diff = coil.displacement(dev) - true_displacement_mm(dev)
    return float(np.sqrt(np.mean(np.sum(diff**2, axis=1))))


def test_fit_phantom_writes_model_table_and_report(scans, tmp_path, capsys):
    out = tmp_path / "out"
    code, stdout, err = _run(["fit", "phantom", scans["images"][0], "--phantom", scans["definition"],
                              "--degree", 5, "--out", out / "coil.json", "--report", out / "report",
                              "--markers-tsv", out / "markers.tsv", "--out-summary", out / "summary.json",
                              "--table-position", 0, 0, 0, "--date", "2026-12-02"], capsys)
    assert code == 0, err
    assert "research" in stdout.lower()
    coil = load_coil(out / "coil.json")
    assert coil.source["kind"] == "fit" and coil.source["method"] == "phantom"
    # The file is valid under the format's JSON schema (draft 2020-12, the jsonschema package).
    jsonschema = pytest.importorskip("jsonschema")
    schema = json.loads((Path(__file__).parents[1] / "docs" / "coil-model.schema.json").read_text())
    jsonschema.Draft202012Validator(schema).validate(json.loads((out / "coil.json").read_text()))
    assert coil.source["samples"] == scans["markers"] and coil.source["date"] == "2026-12-02"
    assert _volume_rms(coil, DeviceFrame("HFS"), np.random.default_rng(1)) < DISPLACEMENT_RMS_TOL_MM

    summary = json.loads((out / "summary.json").read_text())
    rot = Rotation.from_matrix(summary["pose"]["rotation"])
    assert np.degrees((rot * ROTATION.inv()).magnitude()) < POSE_ROTATION_TOL_DEG
    assert np.linalg.norm(np.array(summary["pose"]["translation_ras_mm"]) - TRANSLATION_RAS_MM) \
        < POSE_TRANSLATION_TOL_MM
    sha = hashlib.sha256((out / "coil.json").read_bytes()).hexdigest()
    assert summary["coil_sha256"] == sha

    lines = (out / "markers.tsv").read_text().splitlines()
    assert len(lines) == 1 + summary["markers"] == 1 + scans["markers"]
    header = lines[0].split("\t")
    row = dict(zip(header, lines[1].split("\t"), strict=True))
    residual = np.array([float(row[f"residual_{c}_mm"]) for c in "ras"])
    detected = np.array([float(row[f"detected_{c}_mm"]) for c in "ras"])
    predicted = np.array([float(row[f"predicted_{c}_mm"]) for c in "ras"])
    np.testing.assert_allclose(residual, predicted - detected, atol=2e-4)

    page = (out / "report" / "phantom_fit.html").read_text()
    assert "not diagnosis" in page and 'id="coefficients"' in page and 'id="markers"' in page
    assert 'data-key="sha256"' in page and sha in page
    assert (out / "report" / f"coil-{sha[:12]}.html").exists()
    assert not list(out.rglob("*.partial-*"))


def test_two_table_positions_in_one_fit(scans, tmp_path, capsys):
    out = tmp_path / "coil.json"
    argv = ["fit", "phantom", *scans["images"], "--phantom", scans["definition"], "--degree", 7,
            "--symmetry", "mirror", "--fit-isocenter-offset", "--out", out,
            "--out-summary", tmp_path / "s.json"]
    for tp in TABLE_POSITIONS:
        argv += ["--scan-table-position", *tp]
    code, stdout, err = _run(argv, capsys)
    assert code == 0, err
    summary = json.loads((tmp_path / "s.json").read_text())
    assert [s["matched"] for s in summary["scans"]] == [scans["markers"]] * 2
    sigma = np.array(summary["isocenter_correction_sigma_mm"])
    assert np.all(np.abs(summary["isocenter_correction_mm"]) < ISOCENTER_SIGMAS * sigma)
    coil = load_coil(out)
    for tp in TABLE_POSITIONS:
        frame = DeviceFrame("HFS", offset_from_table_position(tp))
        assert _volume_rms(coil, frame, np.random.default_rng(2)) < DISPLACEMENT_RMS_TOL_MM


def _bad_definition(folder: Path) -> Path:
    doc = json.loads((folder / "phantom.json").read_text())
    doc["markers"][7]["diameter_mm"] = -1
    path = folder / "bad_phantom.json"
    path.write_text(json.dumps(doc))
    return path


def _blank_image(folder: Path) -> Path:
    rng = np.random.default_rng(0)
    path = folder / "blank.nii.gz"
    nib.save(nib.Nifti1Image(rng.normal(1.0, 0.01, (40, 40, 40)).astype(np.float32), np.eye(4)), str(path))
    return path


BAD = [
    ("missing phantom", lambda s, t: ["--phantom", t / "nope.json"], "nope.json", "not found"),
    ("bad field", lambda s, t: ["--phantom", _bad_definition(t)], "markers[7].diameter_mm", "positive"),
    ("missing image", lambda s, t: ["--phantom", s["definition"], t / "none.nii.gz"], "none.nii.gz",
     "not found"),
    ("no markers", lambda s, t: ["--phantom", s["definition"], _blank_image(t)], "blank.nii.gz", "markers"),
    ("degree", lambda s, t: ["--phantom", s["definition"], "--degree", 12], "--degree", "2 to 9"),
    ("isocenter without symmetry", lambda s, t: ["--phantom", s["definition"], "--fit-isocenter-offset"],
     "--fit-isocenter-offset", "symmetry"),
    ("table positions", lambda s, t: ["--phantom", s["definition"], "--scan-table-position", 0, 0, 0,
                                      "--scan-table-position", 0, 0, 1], "--scan-table-position", "one per"),
    ("mode", lambda s, t: ["--phantom", s["definition"], "--mode", "inplane"], "--mode", "3-D"),
    ("loss scale", lambda s, t: ["--phantom", s["definition"], "--loss-scale-mm", 0], "--loss-scale-mm",
     "positive"),
]


@pytest.mark.parametrize("case, extra, where, what", BAD, ids=[b[0] for b in BAD])
def test_bad_input_one_line_exit_1_nothing_written(scans, tmp_path, capsys, case, extra, where, what):
    inputs = tmp_path / "inputs"
    inputs.mkdir()
    (inputs / "phantom.json").write_text(scans["definition"].read_text())
    args = extra(scans, inputs)
    images = [a for a in args if str(a).endswith(".nii.gz")] or [scans["images"][0]]
    args = [a for a in args if not str(a).endswith(".nii.gz")]
    out = tmp_path / "out"
    code, stdout, err = _run(["--quiet", "fit", "phantom", *images, *args, "--out", out / "coil.json",
                              "--report", out / "report", "--markers-tsv", out / "m.tsv",
                              "--out-summary", out / "s.json"], capsys)
    assert code == 1
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("nl-unwarp: error:")
    assert where in lines[0] and what in lines[0]
    assert not out.exists() or not any(out.rglob("*"))


def test_interface_gives_the_command_s_model(scans, tmp_path, capsys):
    code, _, err = _run(["fit", "phantom", scans["images"][0], "--phantom", scans["definition"], "--degree",
                         4, "--out", tmp_path / "cli.json"], capsys)
    assert code == 0, err
    node = FitPhantom(degree=4, report=False)
    node.inputs.in_files = [str(scans["images"][0])]
    node.inputs.phantom = str(scans["definition"])
    work = tmp_path / "node"
    work.mkdir()
    import os

    cwd = os.getcwd()
    try:
        os.chdir(work)
        result = node.run()
    finally:
        os.chdir(cwd)
    ours = load_coil(result.outputs.out_coil)
    cli = load_coil(tmp_path / "cli.json")
    for axis in "xyz":
        np.testing.assert_array_equal(ours.axes[axis].alpha, cli.axes[axis].alpha)
        np.testing.assert_array_equal(ours.axes[axis].beta, cli.axes[axis].beta)
    assert Path(result.outputs.out_markers).exists()
    assert result.outputs.summary["markers"] == scans["markers"]


def test_a_turned_phantom_needs_its_rough_rotation(scans, tmp_path, capsys):
    # The phantom turned 30 degrees about z: from the world axes no orientation matches;
    # given a rough rotation (27 degrees) the fit finds the true pose.
    markers, diameters = lattice_phantom(20.0, MARKER_EXTENT_MM)
    turned = Rotation.from_euler("z", 30.0, degrees=True) * ROTATION
    image, affine, _ = simulate_scan(markers, diameters, body_radius_mm=BODY_RADIUS_MM,
                                     rotation=turned.as_matrix(), translation_ras_mm=TRANSLATION_RAS_MM,
                                     frame=DeviceFrame("HFS"), voxel_mm=2.5, fov_mm=210.0, noise_sigma=0.02,
                                     seed=7)
    path = tmp_path / "turned.nii.gz"
    nib.save(nib.Nifti1Image(image, affine), str(path))
    base = ["fit", "phantom", path, "--phantom", scans["definition"], "--degree", 5, "--isocenter-offset",
            0, 0, 0, "--out-summary", tmp_path / "s.json"]
    code, _, err = _run([*base, "--out", tmp_path / "coil.json", "--phantom-rotation", 0, 0, 27], capsys)
    assert code == 0, err
    pose = json.loads((tmp_path / "s.json").read_text())["pose"]
    assert np.degrees((Rotation.from_matrix(pose["rotation"]) * turned.inv()).magnitude()) \
        < POSE_ROTATION_TOL_DEG
    code, _, err = _run(["--quiet", *base, "--out", tmp_path / "other.json"], capsys)
    if code == 0:
        # A match from the wrong start leaves markers out or lands on a wrong pose.
        other = json.loads((tmp_path / "s.json").read_text())
        wrong = np.degrees((Rotation.from_matrix(other["pose"]["rotation"]) * turned.inv()).magnitude())
        assert wrong > 1.0 or other["scans"][0]["matched"] < scans["markers"] // 2
    else:
        assert code == 1 and "turned.nii.gz" in err and not (tmp_path / "other.json").exists()


def test_markers_missing_from_the_scan_are_warned_about(scans, tmp_path, caplog):
    # The definition lists markers the scanned phantom does not have (a lattice shell
    # beyond 80 mm): they are left unmatched, the fit still runs, and a warning says so.
    from nl_unwarp.interfaces.phantom import fit_phantom_files

    doc = json.loads(scans["definition"].read_text())
    ticks = np.arange(-4, 5) * 20.0
    grid = np.stack(np.meshgrid(ticks, ticks, ticks, indexing="ij"), -1).reshape(-1, 3)
    shell = grid[(np.linalg.norm(grid, axis=1) > MARKER_EXTENT_MM) & (np.linalg.norm(grid, axis=1) <= 90.0)]
    doc["markers"] += [{"position_mm": p.tolist(), "diameter_mm": 6.0} for p in shell]
    definition = tmp_path / "more.json"
    definition.write_text(json.dumps(doc))
    with caplog.at_level("WARNING", logger="nl_unwarp"):
        s = fit_phantom_files([scans["images"][0]], definition, tmp_path / "coil.json", degree=4,
                              isocenter_offsets=[(0.0, 0.0, 0.0)])
    assert s["scans"][0]["matched"] == scans["markers"]
    assert s["scans"][0]["missing"] == len(shell)
    assert any("markers matched" in r.getMessage() for r in caplog.records)
