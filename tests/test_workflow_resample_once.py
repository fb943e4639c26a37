"""Resample-once pipelines: factories, interfaces, the compose CLI, and end-to-end runs.

External references: SimpleITK reads the composite .h5 the pipeline writes
and resamples the raw image through it (must match our single resampling);
antspyx's registration must recover the known (invented) head pose.
"""

from __future__ import annotations

import importlib
import logging
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
import SimpleITK as sitk
from sampling import sitk_points

from nl_unwarp.api import FIELD_MARGIN_MM
from nl_unwarp.cli import main as cli_main
from nl_unwarp.compose import AffineStep, FactorStep, compose_chain, resample_chain
from nl_unwarp.interfaces.compose import ComposeTransforms, MakeComposableField, ResampleOnce
from nl_unwarp.io.atomic import OutputSet
from nl_unwarp.io.itk import read_itk_field, write_itk_field
from nl_unwarp.io.nifti import write_image
from nl_unwarp.io.transforms import load_chain, read_itk_affine, write_itk_affine
from nl_unwarp.workflows.resample_once import init_resample_once_wf, init_series_resample_once_wf

WORKFLOWS = Path(__file__).resolve().parents[1] / "workflows"
#: Registration on 6 mm voxels of a smooth phantom: pose recovered to half a
#: voxel (mean over points within 50 mm of the centre), mm. Measured 0.25-1.6
#: over repeated runs (ITK's threads make it vary). The inverse pose (a
#: convention error) is 4-7 mm away: checked as a negative control.
POSE_TOL_MM = 3.0
#: SimpleITK B-spline through the composite vs our cubic B-spline through the
#: folded field: same trilinear field rule, float32 field storage and ITK's
#: edge-sample rule vs our mirror away from edges; intensities 0-110.
SITK_ATOL = 0.05
EDGE_VOXELS = 3


def _script(name: str):
    if str(WORKFLOWS) not in sys.path:
        sys.path.insert(0, str(WORKFLOWS))
    return importlib.import_module(name)


def _edges(wf) -> set[tuple[str, str]]:
    return {(u.name, v.name) for u, v in wf._graph.edges()}


def test_resample_once_factory_connections():
    wf = init_resample_once_wf(order=1, write_composite="x5")
    assert {("inputnode", "chain"), ("chain", "resample"), ("inputnode", "resample"),
            ("resample", "outputnode"), ("chain", "compose")} <= _edges(wf)
    assert ("compose", "resample") not in _edges(wf)  # one pass: no stored field in between
    assert wf.get_node("compose").inputs.write_composite == "x5"
    assert not wf.get_node("compose").inputs.write_field
    assert wf.get_node("resample").inputs.order == 1
    assert "jacobian_map" in _connected(wf, "inputnode", "resample")
    bare = init_resample_once_wf(write_composite="none")
    assert bare.get_node("compose") is None
    fields = init_resample_once_wf(write_field=True)
    assert "jacobian_map" in _connected(fields, "inputnode", "compose")
    series = init_series_resample_once_wf()
    assert ("inputnode", "resample") in _edges(series) and series.get_node("compose") is None
    assert {"volume_transforms", "transforms", "jacobian_map"} <= _connected(series, "inputnode",
                                                                             "resample")
    assert {("chains", "compose")} <= _edges(init_series_resample_once_wf(write_fields=True))


def _connected(wf, source: str, target: str) -> set[str]:
    """Input names of ``target`` fed by ``source``."""
    for u, v, data in wf._graph.edges(data=True):
        if u.name == source and v.name == target:
            return {dst for _, dst in data["connect"]}
    return set()


def test_pipeline_factories_build():
    morph = _script("morphometry").init_morphometry_wf(registration="SyN")
    assert {("correction_field", "corrected"), ("corrected", "register"),
            ("register", "resample_once_wf"), ("correction_field", "resample_once_wf")} <= _edges(morph)
    assert morph.get_node("register").inputs.transform_type == "SyN"
    assert "inputnode.jacobian_map" in _connected(morph, "correction_field", "resample_once_wf")
    no_jac = _script("morphometry").init_morphometry_wf(jacobian=False)
    assert "inputnode.jacobian_map" not in _connected(no_jac, "correction_field", "resample_once_wf")
    func = _script("functional").init_functional_wf()
    assert {("corrected", "motion"), ("motion", "series_resample_once_wf")} <= _edges(func)
    assert "inputnode.jacobian_map" in _connected(func, "correction_field", "series_resample_once_wf")


def test_composable_field_default_margin_is_the_library_one():
    assert MakeComposableField().inputs.margin_mm == FIELD_MARGIN_MM


def test_composable_field_at_another_spacing(small_chain, tmp_path, monkeypatch):
    """MakeComposableField(field_spacing_mm=...) writes the field at that voxel size (nibabel
    reads it back) with the Jacobian map on the raw grid."""
    from nl_unwarp.demo import demo_coil_path

    monkeypatch.chdir(tmp_path)
    reference = small_chain[0] / "ref.nii.gz"
    result = MakeComposableField(reference=str(reference), coil_model=str(demo_coil_path()),
                                 isocenter_offset_mm=[0.0, 0.0, 20.0], field_spacing_mm=5.0).run()
    np.testing.assert_allclose(nib.load(result.outputs.out_field).header.get_zooms()[:3], 5.0, rtol=1e-6)
    assert nib.load(result.outputs.out_jacobian).shape[:3] == nib.load(reference).shape[:3]


@pytest.fixture
def small_chain(tmp_path):
    """A reference image, an affine and a field (files), and the chain they make."""
    ref_aff = np.diag([3.0, 3.0, 3.0, 1.0])
    ref_aff[:3, 3] = -15.0
    field_aff = np.diag([2.5, 2.5, 2.5, 1.0])
    field_aff[:3, 3] = -25.0
    rng = np.random.default_rng(11)
    disp = rng.normal(0.0, 1.0, (21, 21, 21, 3)).astype(np.float32)
    matrix = np.eye(4)
    matrix[:3, 3] = [1.0, -2.0, 0.5]
    with OutputSet() as out:
        write_image(out, tmp_path / "ref.nii.gz", np.zeros((11, 11, 11), np.float32), ref_aff)
        write_itk_affine(out, tmp_path / "a.mat", matrix)
        write_itk_field(out, tmp_path / "g.nii.gz", disp, field_aff)
    # A Jacobian-like map on its own grid (the raw grid of a correction), and a raw image.
    jac_aff = np.diag([2.0, 2.0, 2.0, 1.0])
    jac_aff[:3, 3] = -20.0
    raw_aff = np.diag([2.5, 2.5, 2.5, 1.0])
    raw_aff[:3, 3] = -24.0
    ijk = np.stack(np.meshgrid(*[np.arange(20.0)] * 3, indexing="ij"), -1)
    raw = 100.0 + 20.0 * np.sin(ijk[..., 0] / 3.0) * np.cos(ijk[..., 1] / 4.0) + ijk[..., 2]
    with OutputSet() as out:
        write_image(out, tmp_path / "jac.nii.gz", rng.uniform(0.8, 1.2, (21, 21, 21)).astype(np.float32),
                    jac_aff)
        write_image(out, tmp_path / "raw.nii.gz", np.stack([raw, 2 * raw], -1).astype(np.float32), raw_aff)
    files = [tmp_path / "a.mat", tmp_path / "g.nii.gz"]
    chain = [s for f in files for s in load_chain(f)]
    return tmp_path, files, chain, ref_aff


def _jacobian_chain(root, chain):
    """The chain with the map of the fixture just before its last step (the field)."""
    jac = nib.load(root / "jac.nii.gz")
    return chain[:-1] + [FactorStep(np.asarray(jac.dataobj, np.float32), jac.affine)] + chain[-1:]


def _raw(root):
    img = nib.load(root / "raw.nii.gz")
    return np.asarray(img.dataobj, np.float32), img.affine


def test_compose_interface_matches_library(small_chain, tmp_path):
    root, files, chain, ref_aff = small_chain
    node = ComposeTransforms(transforms=[str(f) for f in files], reference=str(root / "ref.nii.gz"),
                             write_composite="h5")
    result = node.run(cwd=str(tmp_path))
    disp, aff = read_itk_field(result.outputs.out_field)
    expected = compose_chain(chain, (11, 11, 11), ref_aff, on_outside="ignore").disp_ras_mm
    np.testing.assert_allclose(disp, expected, atol=1e-6)
    np.testing.assert_allclose(aff, ref_aff, atol=1e-5)
    assert sitk.ReadTransform(result.outputs.out_composite).GetName() == "CompositeTransform"


def test_compose_interface_writes_the_factor_and_only_what_is_asked(small_chain, tmp_path):
    root, files, chain, ref_aff = small_chain
    node = ComposeTransforms(transforms=[str(f) for f in files], reference=str(root / "ref.nii.gz"),
                             jacobian_map=str(root / "jac.nii.gz"), write_field=False)
    result = node.run(cwd=str(tmp_path))
    assert not (tmp_path / "composed_field.nii.gz").exists()
    expected = compose_chain(_jacobian_chain(root, chain), (11, 11, 11), ref_aff, on_outside="ignore")
    np.testing.assert_allclose(nib.load(result.outputs.out_factor).get_fdata(), expected.factor, rtol=1e-6)
    assert np.ptp(expected.factor) > 0.1  # the map was sampled, not a constant


def test_resample_once_interface_per_volume_transforms_and_jacobian(small_chain, tmp_path):
    """Volume t goes through [its own transform, *shared]; the map sits before the last step."""
    root, files, chain, ref_aff = small_chain
    motion = []
    with OutputSet() as out:
        for t, shift in enumerate(([0.0, 0.0, 0.0], [2.0, -1.0, 0.5])):
            m = np.eye(4)
            m[:3, 3] = shift
            motion.append(write_itk_affine(out, tmp_path / f"motion{t}.txt", m))
    node = ResampleOnce(in_file=str(root / "raw.nii.gz"), transforms=[str(files[1])],
                        volume_transforms=[str(m) for m in motion], reference=str(root / "ref.nii.gz"),
                        jacobian_map=str(root / "jac.nii.gz"), order=1)
    got = nib.load(node.run(cwd=str(tmp_path)).outputs.out_file).get_fdata()
    raw, raw_aff = _raw(root)
    for t, path in enumerate(motion):
        vol_chain = _jacobian_chain(root, load_chain(path) + chain[-1:])
        expected = resample_chain(raw[..., t], raw_aff, vol_chain, (11, 11, 11), ref_aff, order=1,
                                  on_outside="ignore").data
        np.testing.assert_allclose(got[..., t], expected, rtol=0, atol=1e-4)
    assert np.abs(got[..., 1] - 2 * got[..., 0]).max() > 1.0  # the volumes moved differently
    # jacobian=False ignores the map.
    node.inputs.jacobian = False
    (tmp_path / "plain").mkdir()
    plain = nib.load(node.run(cwd=str(tmp_path / "plain")).outputs.out_file).get_fdata()
    assert np.abs(plain - got).max() > 1.0


def test_cli_compose_resamples_once_with_the_jacobian(small_chain, capsys):
    root, files, chain, ref_aff = small_chain
    code = cli_main(["--quiet", "compose", *map(str, files), "--reference", str(root / "ref.nii.gz"),
                     "--source", str(root / "raw.nii.gz"), "--out-image", str(root / "once.nii.gz"),
                     "--jacobian-map", str(root / "jac.nii.gz"), "--out-factor", str(root / "f.nii.gz"),
                     "--order", "1"])
    assert code == 0
    out = capsys.readouterr().out
    assert "resampled once   2 volume(s)" in out and "affine -> factor -> field" in out
    raw, raw_aff = _raw(root)
    expected = resample_chain(raw[..., 1], raw_aff, _jacobian_chain(root, chain), (11, 11, 11), ref_aff,
                              order=1, on_outside="ignore").data
    np.testing.assert_allclose(nib.load(root / "once.nii.gz").get_fdata()[..., 1], expected, atol=1e-4)
    factor = compose_chain(_jacobian_chain(root, chain), (11, 11, 11), ref_aff, on_outside="ignore").factor
    np.testing.assert_allclose(nib.load(root / "f.nii.gz").get_fdata(), factor, rtol=1e-6)


@pytest.mark.parametrize(("extra", "words"), [
    (["--source", "RAW"], "--source/--out-image"),
    (["--out-factor", "f.nii.gz"], "needs the Jacobian map"),
    ([], "nothing to write"),
])
def test_cli_compose_usage_errors(small_chain, capsys, extra, words):
    root, files, _, _ = small_chain
    extra = [str(root / "raw.nii.gz") if e == "RAW" else e for e in extra]
    code = cli_main(["--quiet", "compose", *map(str, files), "--reference", str(root / "ref.nii.gz"), *extra])
    assert code == 1
    assert words in capsys.readouterr().err


def test_jacobian_map_needs_the_correction_last(small_chain, capsys):
    root, files, _, _ = small_chain
    code = cli_main(["--quiet", "compose", str(files[1]), str(files[0]), "--reference",
                     str(root / "ref.nii.gz"), "--source", str(root / "raw.nii.gz"),
                     "--out-image", str(root / "x.nii.gz"), "--jacobian-map", str(root / "jac.nii.gz")])
    assert code == 1
    assert "ends with an affine" in capsys.readouterr().err
    assert not (root / "x.nii.gz").exists()


def test_cli_compose_writes_field_and_composite(small_chain, capsys):
    root, files, chain, ref_aff = small_chain
    code = cli_main(["--quiet", "compose", *map(str, files), "--reference", str(root / "ref.nii.gz"),
                     "--out-field", str(root / "composed.nii.gz"), "--out-composite", str(root / "c.h5")])
    assert code == 0
    assert "affine -> field" in capsys.readouterr().out
    disp, _ = read_itk_field(root / "composed.nii.gz")
    np.testing.assert_allclose(disp, compose_chain(chain, (11, 11, 11), ref_aff,
                                                   on_outside="ignore").disp_ras_mm, atol=1e-6)
    # The un-folded chain maps points as the folded field does (SimpleITK reads it).
    tx = sitk.ReadTransform(str(root / "c.h5"))
    p = ref_aff[:3, :3] @ [5, 6, 4] + ref_aff[:3, 3]
    q = sitk_points(tx, p[None])[0]
    np.testing.assert_allclose(q - p, disp[5, 6, 4], atol=1e-5)


def test_cli_compose_help_states_the_order(capsys):
    with pytest.raises(SystemExit):
        cli_main(["compose", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "first is applied first to a point of the reference grid" in text
    assert "reverse of ITK CompositeTransform" in text
    assert "multiplied by det J where the last transform, the correction, is applied" in text
    assert "ITK and similar tools apply identity" in text and "refused (raise)" in text


def test_cli_compose_refuses_uncovered_target(small_chain, tmp_path, capsys, caplog):
    root, files, _, _ = small_chain
    big = np.diag([6.0, 6.0, 6.0, 1.0])
    big[:3, 3] = -60.0
    with OutputSet() as out:
        write_image(out, tmp_path / "big.nii.gz", np.zeros((21, 21, 21), np.float32), big)
    code = cli_main(["--quiet", "compose", *map(str, files), "--reference", str(tmp_path / "big.nii.gz"),
                     "--out-field", str(tmp_path / "x.nii.gz"), "--on-outside", "raise"])
    assert code == 1
    assert "identity" in capsys.readouterr().err
    assert not (tmp_path / "x.nii.gz").exists()
    # The default warns (logged), writes, and reports the uncovered share.
    with caplog.at_level(logging.WARNING, logger="nl_unwarp"):
        code = cli_main(["--quiet", "compose", *map(str, files), "--reference",
                         str(tmp_path / "big.nii.gz"), "--out-field", str(tmp_path / "x.nii.gz")])
    assert code == 0 and "identity" in caplog.text
    assert (tmp_path / "x.nii.gz").exists()
    share = float(capsys.readouterr().out.split("uncovered ")[1].split(" %")[0])
    assert share > 1.0


def _pose_error_mm(estimated: np.ndarray, expected: np.ndarray) -> float:
    rng = np.random.default_rng(5)
    pts = rng.uniform(-50.0, 50.0, (200, 3))
    pts = pts[np.linalg.norm(pts, axis=1) < 50.0]
    a = pts @ estimated[:3, :3].T + estimated[:3, 3]
    b = pts @ expected[:3, :3].T + expected[:3, 3]
    return float(np.linalg.norm(a - b, axis=1).mean())


@pytest.mark.slow
def test_morphometry_end_to_end(tmp_path):
    morph = _script("morphometry")
    inputs = morph.make_demo_inputs(tmp_path, shape=(32, 36, 32), voxel_mm=6.0)
    out = morph.run(tmp_path, inputs, registration="Rigid")  # the invented pose is rigid
    # antspyx recovers the invented pose: template -> subject is its inverse pull.
    estimated = read_itk_affine(out["registration"][0])
    assert _pose_error_mm(estimated, np.linalg.inv(morph.rigid(**morph.DEMO_POSE))) < POSE_TOL_MM
    assert _pose_error_mm(estimated, morph.rigid(**morph.DEMO_POSE)) > POSE_TOL_MM
    template = np.asarray(nib.load(inputs["template"]).dataobj, float)
    once = np.asarray(nib.load(out["t1w_template"]).dataobj, float)
    raw = np.asarray(nib.load(inputs["t1w"]).dataobj, float)
    assert np.abs(once - template).mean() < 0.5 * np.abs(raw - template).mean()
    # SimpleITK through the written composite (ITK order inside), times our Jacobian map
    # resampled through the registration alone (its value at the corrected-space point),
    # = our single resampling with the intensity factor.
    ref = sitk.ReadImage(inputs["template"], sitk.sitkFloat64)
    ext = sitk.Resample(sitk.ReadImage(inputs["t1w"], sitk.sitkFloat64), ref,
                        sitk.ReadTransform(out["composite"]), sitk.sitkBSpline, 0.0, sitk.sitkFloat64)
    registration = sitk.CompositeTransform([sitk.ReadTransform(p) for p in reversed(out["registration"])])
    det_j = sitk.Resample(sitk.ReadImage(out["correction_jacobian"], sitk.sitkFloat64), ref, registration,
                          sitk.sitkLinear, 0.0, sitk.sitkFloat64)
    ext = (sitk.GetArrayFromImage(ext) * sitk.GetArrayFromImage(det_j)).transpose(2, 1, 0)
    e = EDGE_VOXELS
    inner = (slice(e, -e),) * 3
    inside = template[inner] > 1.0
    np.testing.assert_allclose(ext[inner][inside], once[inner][inside], atol=SITK_ATOL)
    jac = np.asarray(nib.load(out["correction_jacobian"]).dataobj)
    assert np.abs(jac - 1).max() > 0.01  # the factor is not trivial on this grid


@pytest.mark.slow
def test_functional_end_to_end(tmp_path):
    func = _script("functional")
    inputs = func.make_demo_inputs(tmp_path, shape=(30, 34, 26), voxel_mm=6.0)
    out = func.run(tmp_path, inputs, write_fields=True)
    for path, pose in zip(out["motion"], func.DEMO_MOTION, strict=True):
        expected = np.linalg.inv(func.rigid(**pose))
        assert _pose_error_mm(read_itk_affine(path), expected) < POSE_TOL_MM
        if pose["translation_mm"] != (0.0, 0.0, 0.0):
            assert _pose_error_mm(read_itk_affine(path), func.rigid(**pose)) > POSE_TOL_MM
    raw = np.asarray(nib.load(inputs["bold"]).dataobj, float)
    once = np.asarray(nib.load(out["bold_once"]).dataobj, float)
    assert once.shape == raw.shape
    # Motion removed: volumes agree far better than the raw series does.
    assert once.std(-1).mean() < 0.5 * raw.std(-1).mean()
    # Volume 0 (identity motion) is the plain correction: compose of [I, G].
    g = load_chain(out["correction_field"])[0]
    direct = compose_chain([AffineStep(np.eye(4)), g], raw.shape[:3], nib.load(inputs["bold"]).affine,
                           on_outside="ignore")
    np.testing.assert_allclose(read_itk_field(out["composed_fields"][0])[0], direct.disp_ras_mm, atol=1e-6)
    # ... and its intensities are SimpleITK's through the correction field times our Jacobian map.
    series = sitk.ReadImage(inputs["bold"], sitk.sitkFloat64)
    vol0 = sitk.Extract(series, list(series.GetSize()[:3]) + [0], [0, 0, 0, 0])
    field = sitk.DisplacementFieldTransform(sitk.Image(sitk.ReadImage(out["correction_field"],
                                                                      sitk.sitkVectorFloat64)))
    ext = sitk.GetArrayFromImage(sitk.Resample(vol0, vol0, field, sitk.sitkBSpline, 0.0,
                                               sitk.sitkFloat64)).transpose(2, 1, 0)
    jac = np.asarray(nib.load(out["correction_jacobian"]).dataobj, float)
    e = EDGE_VOXELS
    inner = (slice(e, -e),) * 3
    np.testing.assert_allclose((ext * jac)[inner], once[..., 0][inner], atol=SITK_ATOL)


def test_cli_compose_writes_the_image_and_the_transforms_together_or_not_at_all(small_chain, capsys):
    """A failure in the second output (a composite suffix that cannot hold the chain) leaves
    neither the resampled image nor the field behind, nor any temporary file."""
    root, files, _, _ = small_chain
    out = root / "together"
    code = cli_main(["--quiet", "compose", *map(str, files), "--reference", str(root / "ref.nii.gz"),
                     "--source", str(root / "raw.nii.gz"), "--out-image", str(out / "once.nii.gz"),
                     "--out-field", str(out / "composed.nii.gz"), "--out-composite", str(out / "chain.txt")])
    assert code == 1
    assert "chain.txt" in capsys.readouterr().err
    assert not out.exists()  # the folder it made is gone too
    code = cli_main(["--quiet", "compose", *map(str, files), "--reference", str(root / "ref.nii.gz"),
                     "--source", str(root / "raw.nii.gz"), "--out-image", str(out / "once.nii.gz"),
                     "--out-field", str(out / "composed.nii.gz")])
    assert code == 0
    assert sorted(p.name for p in out.iterdir()) == ["composed.nii.gz", "once.nii.gz"]
