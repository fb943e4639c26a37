"""The nipype Interfaces inside real nipype Workflows (Linear and MultiProc), and the hash cache."""

from __future__ import annotations

import json
import shutil
from importlib import resources
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from bidsgen import T1W, T2W_2D, configure_nipype, make_study

from nl_unwarp.compose import FIELD_MARGIN_MM, grid_with_margin, margin_slices
from nl_unwarp.interfaces.bids import DecideCorrection
from nl_unwarp.interfaces.warp import ApplyWarp, MakeWarp

#: Our linear resampling (order 1) and SimpleITK's linear interpolator evaluate
#: the same trilinear formula at the same points; float32 rounding of the
#: positions leaves differences far below this fraction of the image maximum.
LINEAR_AGREEMENT = 1e-4
#: Voxels whose sample point lies this close (voxels) to the raw grid's edge are
#: left out: the two libraries treat the boundary differently.
EDGE_VOXELS = 1.5


def _coil(name: str) -> Path:
    return Path(str(resources.files("nl_unwarp") / "data" / name))


def _warp_wf(tmp: Path, image: Path, coil: Path, name: str = "wf"):
    from nipype.pipeline import engine as pe

    wf = pe.Workflow(name=name, base_dir=str(tmp / "work"))
    make = pe.Node(MakeWarp(reference=str(image), coil_model=str(coil), table_position_mm=[0, 0, -20.0]),
                   name="make_warp")
    apply = pe.Node(ApplyWarp(in_file=str(image), order=1, jacobian=False), name="apply_warp")
    wf.connect(make, "out_field", apply, "field")
    return wf


def _node_result(tmp: Path, wf: str, node: str) -> Path:
    return tmp / "work" / wf / node / f"result_{node}.pklz"


@pytest.fixture
def study(tmp_path, monkeypatch):
    configure_nipype(tmp_path)
    return make_study(tmp_path, monkeypatch, subjects_per_site=1, moved_table=False)


def test_field_agrees_with_simpleitk(study, tmp_path):
    """ApplyWarp(order=1) against SimpleITK resampling through the same ITK field file."""
    import SimpleITK as sitk

    image = study.root / T1W
    _warp_wf(tmp_path, image, _coil("demo_coil.json")).run(plugin="Linear")
    node_dir = tmp_path / "work" / "wf"
    ours = np.asarray(nib.load(node_dir / "apply_warp" / "corrected.nii.gz").dataobj)
    # SimpleITK reads our field as a displacement field transform (CONVENTIONS.md section 4).
    field = sitk.ReadImage(str(node_dir / "make_warp" / "field.nii.gz"), sitk.sitkVectorFloat64)
    transform = sitk.DisplacementFieldTransform(sitk.Image(field))
    raw = sitk.ReadImage(str(image), sitk.sitkFloat32)
    ref = sitk.GetArrayFromImage(sitk.Resample(raw, raw, transform, sitk.sitkLinear, 0.0)).T
    disp_lps = np.asarray(nib.load(node_dir / "make_warp" / "field.nii.gz").dataobj)[:, :, :, 0, :]
    # MakeWarp's field extends beyond the image by a margin; ApplyWarp resamples onto the
    # image's own grid, whose voxels are the field's interior ones.
    assert disp_lps.shape[:3] == grid_with_margin(ours.shape, nib.load(image).affine, FIELD_MARGIN_MM)[0]
    disp_lps = disp_lps[margin_slices(ours.shape, disp_lps.shape[:3])]
    assert np.abs(disp_lps).max() > 0.5  # a real distortion, not an identity
    affine = nib.load(image).affine
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in ours.shape], indexing="ij"), -1)
    disp_ras = disp_lps * np.array([-1.0, -1.0, 1.0])
    sample = (ijk @ affine[:3, :3].T + affine[:3, 3] + disp_ras - affine[:3, 3]) @ np.linalg.inv(
        affine[:3, :3]).T
    inside = np.all((sample > EDGE_VOXELS) & (sample < np.array(ours.shape) - 1 - EDGE_VOXELS), axis=-1)
    assert inside.mean() > 0.5
    scale = np.abs(ref).max()
    assert np.max(np.abs(ours - ref)[inside]) <= LINEAR_AGREEMENT * scale


def test_multiproc_matches_linear(study, tmp_path):
    from nipype.pipeline import engine as pe

    images = [study.root / T1W, study.root / T2W_2D]
    outputs = {}
    for plugin, args in (("Linear", {}), ("MultiProc", {"n_procs": 2, "mp_context": "forkserver"})):
        wf = pe.Workflow(name=f"wf_{plugin}", base_dir=str(tmp_path / "work"))
        for i, image in enumerate(images):
            sub = _warp_wf(tmp_path, image, _coil("demo_coil_b.json"), name=f"img{i}")
            wf.add_nodes([sub])
        wf.run(plugin=plugin, plugin_args=args)
        outputs[plugin] = [np.asarray(nib.load(tmp_path / "work" / f"wf_{plugin}" / f"img{i}" / "apply_warp"
                                               / "corrected.nii.gz").dataobj) for i in range(2)]
    for linear, multi in zip(outputs["Linear"], outputs["MultiProc"], strict=True):
        np.testing.assert_array_equal(linear, multi)


def test_hash_cache_skips_then_reruns_on_new_coil(study, tmp_path):
    from nipype import config

    config.set("execution", "hash_method", "content")
    coil = tmp_path / "bound" / "coil.json"
    coil.parent.mkdir()
    shutil.copyfile(_coil("demo_coil.json"), coil)
    image = study.root / T1W
    _warp_wf(tmp_path, image, coil).run(plugin="Linear")
    result = _node_result(tmp_path, "wf", "make_warp")
    field = tmp_path / "work" / "wf" / "make_warp" / "field.nii.gz"
    first_mtime, first_field = result.stat().st_mtime_ns, np.asarray(nib.load(field).dataobj)

    _warp_wf(tmp_path, image, coil).run(plugin="Linear")
    assert result.stat().st_mtime_ns == first_mtime  # finished node skipped

    shutil.copyfile(_coil("demo_coil_b.json"), coil)  # same path, another gradient system
    _warp_wf(tmp_path, image, coil).run(plugin="Linear")
    assert result.stat().st_mtime_ns != first_mtime
    second_field = np.asarray(nib.load(field).dataobj)
    assert np.abs(second_field - first_field).max() > 0.1
    summary = json.loads((tmp_path / "work" / "wf" / "make_warp" / "summary.json").read_text())
    from nl_unwarp.io.coilfile import coil_sha256

    assert summary["coil_model"]["sha256"] == coil_sha256(_coil("demo_coil_b.json"))
    assert str(coil) not in json.dumps(summary)  # provenance keeps the hash, never the path


def test_decide_feeds_make_warp(study, tmp_path):
    from bids import BIDSLayout
    from nipype.interfaces import utility as niu
    from nipype.pipeline import engine as pe

    image = study.root / T2W_2D
    metadata = BIDSLayout(str(study.root)).get_metadata(str(image))
    wf = pe.Workflow(name="decide_wf", base_dir=str(tmp_path / "work"))
    decide = pe.Node(DecideCorrection(in_file=str(image), metadata=metadata,
                                      site_config=str(study.site_config)), name="decide")
    make = pe.Node(MakeWarp(reference=str(image)), name="make_warp")
    out = pe.Node(niu.IdentityInterface(fields=["decision"]), name="out")
    wf.connect([(decide, make, [("coil_model", "coil_model"), ("mode", "mode"),
                                ("patient_position", "patient_position"),
                                ("table_position_mm", "table_position_mm")]),
                (decide, out, [("decision", "decision")])])
    wf.run(plugin="Linear")
    summary = json.loads((tmp_path / "work" / "decide_wf" / "make_warp" / "summary.json").read_text())
    # The 2D image was corrected in-plane by the scanner: through-plane residual only.
    assert summary["mode"] == "throughplane"
    assert summary["slice_axis"] == 2
    field = np.asarray(nib.load(tmp_path / "work" / "decide_wf" / "make_warp" / "field.nii.gz").dataobj)
    # Slices are axial (k axis along world S = LPS z): only the third component remains.
    assert np.abs(field[..., 0, :2]).max() < 1e-5 < np.abs(field[..., 0, 2]).max()


def test_apply_warp_requires_jacobian_map(study, tmp_path):
    from nipype.pipeline import engine as pe

    wf = _warp_wf(tmp_path, study.root / T1W, _coil("demo_coil.json"))
    wf.get_node("apply_warp").inputs.jacobian = True
    with pytest.raises(RuntimeError):
        wf.run(plugin="Linear")
    crash = next((tmp_path / "crash").glob("crash-*apply_warp*"))
    assert "give the Jacobian map" in crash.read_text()
    assert pe  # nipype engine imported for the workflow above


def test_make_warp_field_spacing(study, tmp_path, monkeypatch):
    """MakeWarp(field_spacing_mm=...) writes the field at that voxel size (read back by nibabel)
    with the margin kept, and reports its grid; the other maps stay on the reference grid."""
    monkeypatch.chdir(tmp_path)
    image = study.root / T1W
    result = MakeWarp(reference=str(image), coil_model=str(_coil("demo_coil.json")),
                      table_position_mm=[0, 0, -20.0], field_spacing_mm=3.5).run()
    field = nib.load(result.outputs.out_field)
    np.testing.assert_allclose(field.header.get_zooms()[:3], 3.5, rtol=1e-6)
    assert nib.load(result.outputs.out_jacobian).shape == nib.load(image).shape[:3]
    grid = json.loads(Path(result.outputs.out_summary).read_text())["field_grid"]
    assert grid["shape"] == list(field.shape[:3]) and grid["margin_mm"] == FIELD_MARGIN_MM
    assert 0.0 < grid["deviation_max_mm"] < 0.05
