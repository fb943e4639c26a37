"""``nl-unwarp fit samples`` end to end, the FitFieldSamples Interface, and bad input.

Outside references: magpylib's Biot-Savart fields of the tests' coil set (Golay saddles and a
Maxwell pair, ``tests/coils.py``) are the truth the fitted model file must reproduce, and
``hashlib`` the SHA-256 the summary records for the written file.
"""

from __future__ import annotations

import hashlib
import json
import os

import numpy as np
import pytest
from coils import coil_set, encode_direct

from nl_unwarp.cli import main
from nl_unwarp.coil import AXES
from nl_unwarp.io.coilfile import load_coil
from nl_unwarp.io.samples import write_field_samples

#: Issue check through the command line: the encoded position inside the sampled sphere, mm.
INSIDE_TOL_MM = 0.05
SAMPLED_RADIUS_MM = 150.0
SAMPLES = 900


@pytest.fixture(scope="module")
def sample_dir(tmp_path_factory):
    """Sample tables of the Biot-Savart coil set on a sphere, and truth at points inside it."""
    folder = tmp_path_factory.mktemp("samples")
    coils = coil_set()
    rng = np.random.default_rng(8)
    v = rng.normal(size=(SAMPLES, 3))
    points = SAMPLED_RADIUS_MM * v / np.linalg.norm(v, axis=1, keepdims=True)
    for name in AXES:
        coil = coils[name]
        gradient_mT_per_m = coil.gradient_t_per_m * 1e3
        bz_mT = coil.encoded_mm(points) * gradient_mT_per_m * 1e-3
        write_field_samples(folder / f"{name}.tsv", points, bz_mT, gradient_mT_per_m=gradient_mT_per_m,
                            axis=name, comment="invented Biot-Savart coil set (tests)")
    inside = rng.normal(size=(300, 3))
    inside *= (SAMPLED_RADIUS_MM * rng.uniform(0, 1, (300, 1)) ** (1 / 3)
               / np.linalg.norm(inside, axis=1, keepdims=True))
    return {"folder": folder, "inside": inside, "truth": encode_direct(coils, inside)}


def _argv(folder, out, *extra):
    return ["--quiet", "fit", "samples", "--x", str(folder / "x.tsv"), "--y", str(folder / "y.tsv"),
            "--z", str(folder / "z.tsv"), "--out", str(out), *extra]


def test_fit_samples_writes_a_model_that_reproduces_biot_savart(sample_dir, tmp_path, capsys):
    out = tmp_path / "out" / "coil.json"
    summary_path = tmp_path / "out" / "fit.json"
    report = tmp_path / "out" / "report"
    code = main(_argv(sample_dir["folder"], out, "--degree", "11", "--symmetry", "mirror",
                      "--out-summary", str(summary_path), "--report", str(report), "--date", "2026-12-02"))
    stdout = capsys.readouterr().out
    assert code == 0
    model = load_coil(out)
    predicted = model.encode(sample_dir["inside"], jacobian=False)[0]
    error = np.linalg.norm(predicted - sample_dir["truth"], axis=-1)
    assert error.max() < INSIDE_TOL_MM
    assert model.source["kind"] == "fit" and model.source["method"] == "field-samples"
    assert model.source["samples"] == 3 * SAMPLES and model.source["date"] == "2026-12-02"
    assert model.valid_radius_mm == pytest.approx(SAMPLED_RADIUS_MM)
    summary = json.loads(summary_path.read_text())
    assert summary["coil_model"]["sha256"] == hashlib.sha256(out.read_bytes()).hexdigest()
    assert summary["symmetry"] == "mirror" and summary["predicted_error_max_mm"] < INSIDE_TOL_MM
    assert {a: summary["axes"][a]["degree"] for a in AXES} == dict.fromkeys(AXES, 11)
    page = (report / "coil-fit.html").read_text()
    for needle in ("Research use.", 'id="fig-residuals"', 'id="fig-error-radius"', 'id="coefficients"',
                   'id="growth"', "grows fast"):
        assert needle in page
    coil_page = report / f"coil-{summary['coil_model']['sha256'][:12]}.html"
    assert coil_page.exists() and coil_page.name in page
    assert "predicted error" in stdout and "research" in stdout.lower()


def test_fit_samples_chooses_the_degree(sample_dir, tmp_path, capsys):
    out = tmp_path / "coil.json"
    assert main(_argv(sample_dir["folder"], out, "--max-degree", "9", "--symmetry", "axial")) == 0
    stdout = capsys.readouterr().out
    model = load_coil(out)
    # Noise-free Biot-Savart samples support every degree tried: the highest is chosen, and said.
    assert model.degree == 9
    assert "degree-at-limit" in stdout
    assert np.count_nonzero(model.axes["z"].alpha[:, 1:]) == 0


def _bad_tables(folder, tmp_path):
    """Variants of the good sample folder, each with one fault."""
    cases = {}
    text = (folder / "z.tsv").read_text().splitlines()
    broken = text[:6] + ["1.0\t2.0\tthree\t0.1"] + text[6:]
    (tmp_path / "broken.tsv").write_text("\n".join(broken) + "\n")
    cases["cell"] = (["--z", str(tmp_path / "broken.tsv")], "broken.tsv: line 7, column z_mm")
    cases["missing"] = (["--z", str(tmp_path / "none.tsv")], "none.tsv: field sample file not found")
    cases["gradient-conflict"] = (["--gradient-mT-per-m", "40"], "the file states")
    cases["gradient-count"] = (["--gradient-mT-per-m", "1", "2"], "--gradient-mT-per-m: give one value")
    cases["degree"] = (["--degree", "eleven"], "--degree: 'eleven' is neither")
    cases["frame"] = (["--table-position", "0", "0", "0"], "NIfTI field maps only")
    few = text[:4] + text[4:24]
    (tmp_path / "few.tsv").write_text("\n".join(few) + "\n")
    cases["few"] = (["--z", str(tmp_path / "few.tsv"), "--degree", "6"], "few.tsv: axis z: 20 samples cannot")
    scaled = [line if line.startswith("#") or line.startswith("x_mm") else
              "\t".join(line.split("\t")[:3] + [repr(2 * float(line.split("\t")[3]))]) for line in text]
    (tmp_path / "scaled.tsv").write_text("\n".join(scaled) + "\n")
    cases["linear"] = (["--z", str(tmp_path / "scaled.tsv"), "--degree", "5"],
                       "scaled.tsv: gradient_mT_per_m: the fitted linear term is 2")
    return cases


@pytest.mark.parametrize("case", ["cell", "missing", "gradient-conflict", "gradient-count", "degree", "frame",
                                  "few", "linear"])
def test_bad_input_fails_with_one_line_and_writes_nothing(sample_dir, tmp_path, capsys, case):
    extra, expected = _bad_tables(sample_dir["folder"], tmp_path)[case]
    outdir = tmp_path / "out"
    argv = _argv(sample_dir["folder"], outdir / "coil.json", "--out-summary", str(outdir / "s.json"),
                 "--report", str(outdir / "report"), *extra)
    code = main(argv)
    captured = capsys.readouterr()
    assert code == 1
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("nl-unwarp: error: ") and expected in lines[0], lines
    assert captured.out == ""
    assert not outdir.exists() or not any(outdir.rglob("*"))


def test_usage_errors_exit_2(sample_dir, tmp_path, capsys):
    with pytest.raises(SystemExit) as info:
        main(["fit", "samples", "--x", "a.tsv", "--out", str(tmp_path / "c.json")])
    assert info.value.code == 2
    with pytest.raises(SystemExit) as info:
        main(["fit"])
    assert info.value.code == 2
    assert not any(tmp_path.iterdir())


def test_the_interface_writes_what_the_command_writes(sample_dir, tmp_path, capsys):
    from nl_unwarp.interfaces.fit import FitFieldSamples

    folder = sample_dir["folder"]
    cli_out = tmp_path / "cli.json"
    assert main(_argv(folder, cli_out, "--degree", "7", "--date", "2026-12-02")) == 0
    node_dir = tmp_path / "node"
    node_dir.mkdir()
    cwd = os.getcwd()
    try:
        os.chdir(node_dir)
        result = FitFieldSamples(x_samples=str(folder / "x.tsv"), y_samples=str(folder / "y.tsv"),
                                 z_samples=str(folder / "z.tsv"), degree=7, date="2026-12-02").run()
    finally:
        os.chdir(cwd)
    assert result.outputs.out_coil and os.path.exists(result.outputs.out_report)
    with open(result.outputs.out_coil, encoding="utf-8") as node_coil:
        assert json.load(node_coil)["axes"] == json.loads(cli_out.read_text())["axes"]


def test_exactly_determined_samples_report_what_is_unknown(tmp_path, capsys):
    # 16 samples for the 16 terms of degree 3: the fit passes through every sample, so no
    # sample can be held out and no degree-5 comparison exists; the command says so.
    rng = np.random.default_rng(2)
    v = rng.normal(size=(16, 3))
    points = 100.0 * v / np.linalg.norm(v, axis=1, keepdims=True)
    for c, name in enumerate(AXES):
        write_field_samples(tmp_path / f"{name}.tsv", points, points[:, c] * 0.04, gradient_mT_per_m=40.0)
    assert main(_argv(tmp_path, tmp_path / "coil.json", "--degree", "3")) == 0
    stdout = capsys.readouterr().out
    assert "n/a" in stdout and "predicted error  unknown" in stdout and "no-error-estimate" in stdout
    model = load_coil(tmp_path / "coil.json")
    assert model.axes["x"].linear_coefficient("x") == pytest.approx(1.0, abs=1e-9)


#: A quadratic model inside the fitted basis, sampled without noise: only rounding remains.
EXACT_TOL = 1e-9


def test_nifti_field_maps_in_world_ras_are_mapped_to_the_device_frame(tmp_path, capsys):
    # Field maps of a known model written in world RAS for a feet-first-supine scan with the
    # table moved 30 mm into the bore. Device = R(FFS) LPS + (-tp1, -tp2, tp3) with
    # LPS = diag(-1, -1, 1) RAS (DICOM PS3.3 C.7.6.2.1.1, C.7.3.1.1.2; BIDS TablePosition;
    # docs/conventions.md), R(FFS) = diag(-1, 1, -1). The model in closed Schmidt form
    # (C_2^1 = sqrt(3) x z, S_2^2 = sqrt(3) x y, C_2^0 = (3 z^2 - r^2) / 2 in units of R0).
    import nibabel as nib

    r0, gradient = 150.0, 40.0
    a_x, b_y, a_z = 0.02, -0.015, 0.01

    def encoded(dev):
        x, y, z = (dev[..., i] / r0 for i in range(3))
        return np.stack([r0 * (x + a_x * np.sqrt(3) * x * z), r0 * (y + b_y * np.sqrt(3) * x * y),
                         r0 * (z + a_z * (3 * z * z - (x * x + y * y + z * z)) / 2)], -1)

    affine = np.diag([12.0, 12.0, 12.0, 1.0])
    affine[:3, 3] = -12.0 * 6 + np.array([3.0, -5.0, 7.0])
    ijk = np.stack(np.meshgrid(*[np.arange(13)] * 3, indexing="ij"), -1).astype(float)
    ras = ijk @ affine[:3, :3].T + affine[:3, 3]
    tp = np.array([0.0, 0.0, 30.0])
    device = (ras * [-1.0, -1.0, 1.0]) * [-1.0, 1.0, -1.0] + [-tp[0], -tp[1], tp[2]]
    inside = np.linalg.norm(device, axis=-1) <= 70.0
    u = encoded(device)
    for c, name in enumerate(AXES):
        bz = np.where(inside, u[..., c] * gradient * 1e-3, np.nan).astype(np.float64)
        img = nib.Nifti1Image(bz, affine)
        img.header.set_xyzt_units("mm")
        nib.save(img, str(tmp_path / f"{name}.nii.gz"))
    argv = ["--quiet", "fit", "samples", *sum(([f"--{a}", str(tmp_path / f"{a}.nii.gz")] for a in AXES), []),
            "--gradient-mT-per-m", str(gradient), "--degree", "2", "--reference-radius-mm", str(r0),
            "--position", "FFS", "--table-position", *map(str, tp), "--out", str(tmp_path / "coil.json")]
    assert main(argv) == 0
    model = load_coil(tmp_path / "coil.json")
    assert model.axes["x"].alpha[2, 1] == pytest.approx(a_x, abs=EXACT_TOL)
    assert model.axes["y"].beta[2, 2] == pytest.approx(b_y, abs=EXACT_TOL)
    assert model.axes["z"].alpha[2, 0] == pytest.approx(a_z, abs=EXACT_TOL)
    # Read as device-frame mm instead (no position given): for FFS, RAS y and z run against
    # device y and z, those gradients come out reversed, and the fit is refused (the first
    # reversed axis is named), not written.
    capsys.readouterr()
    argv_device = [a for a in argv if a not in ("--position", "FFS", "--table-position", *map(str, tp))]
    assert main(argv_device[:-1] + [str(tmp_path / "as_device.json")]) == 1
    err = capsys.readouterr().err
    assert "y.nii.gz: gradient_mT_per_m: the fitted linear term is -1" in err
    assert not (tmp_path / "as_device.json").exists()
