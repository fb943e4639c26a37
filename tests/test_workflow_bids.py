"""The BIDS pipeline end to end on a generated dataset: derivatives, provenance, crashes, bad input."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from bidsgen import DWI, MOVED_T1W, SOUTH_T1W, T1W, T2W_2D, configure_nipype, make_study

from nl_unwarp.bids import derivatives as derivatives_module
from nl_unwarp.bids.app import RunOptions, build_plan, run
from nl_unwarp.bids.names import derivative_name
from nl_unwarp.cli import main
from nl_unwarp.errors import InputError
from nl_unwarp.workflows.bids import init_bids_unwarp_wf

IMAGES_PER_SESSION = 4


@pytest.fixture
def study(tmp_path, monkeypatch):
    configure_nipype(tmp_path)
    return make_study(tmp_path, monkeypatch, subjects_per_site=1)


def _options(study, tmp_path, **kw) -> RunOptions:
    return RunOptions(bids_dir=study.root, output_dir=tmp_path / "derivatives",
                      site_config=study.site_config, work_dir=tmp_path / "work", plugin="Linear", **kw)


def test_workflow_builds_one_branch_per_image(study, tmp_path):
    plan = build_plan(_options(study, tmp_path))
    assert len(plan.rows) == 3 * IMAGES_PER_SESSION  # sub-01 ses-1, ses-2; sub-02 ses-1
    wf = init_bids_unwarp_wf(plan=plan, output_dir=tmp_path / "out", site_config=study.site_config)
    names = wf.list_node_names()
    # The 3D-corrected Southbay T1w is skipped: no branch, no sink.
    assert not any(n.startswith("sub_02_ses_1_T1w") for n in names)
    assert sum(n.endswith("_sink") for n in names) == len(plan.rows) - 1
    assert "sub_01_ses_2_T1w_wf.apply_warp" in names
    with_warp = init_bids_unwarp_wf(plan=plan, output_dir=tmp_path / "out", site_config=study.site_config,
                                    emit_warp_for_skipped=True).list_node_names()
    assert "sub_02_ses_1_T1w_wf.make_warp" in with_warp
    assert "sub_02_ses_1_T1w_wf.apply_warp" not in with_warp


def test_end_to_end_derivatives(study, tmp_path):
    from bids import BIDSLayout

    rows, failures = run(_options(study, tmp_path))
    assert failures == []
    out = tmp_path / "derivatives"
    by_image = {r["image"]: r for r in rows}
    assert by_image[SOUTH_T1W]["decision"] == "skip" and not by_image[SOUTH_T1W]["done"]
    assert all(r["done"] for r in rows if r["decision"] != "skip")
    # The moved table puts the head off the isocenter: larger displacement than ses-1.
    assert by_image[MOVED_T1W]["displacement_max_mm"] > by_image[T1W]["displacement_max_mm"] + 0.5

    # BIDS derivatives (BIDS 1.9 "Derivatives: common data types"): pybids indexes them.
    layout = BIDSLayout(str(study.root), derivatives=str(out))
    deriv = layout.derivatives.get_pipeline("nl_unwarp")
    corrected = deriv.get(desc="gnc", suffix="T1w", extension=".nii.gz")
    assert len(corrected) == 2  # sub-01 ses-1 and ses-2
    xfm = deriv.get(suffix="xfm", extension=".nii.gz", subject="01", session="1", acquisition="2d")
    assert len(xfm) == 1 and xfm[0].entities["mode"] == "image"
    assert xfm[0].entities["from"] == "T2worig" and xfm[0].entities["to"] == "T2wgnc"
    description = json.loads((out / "dataset_description.json").read_text())
    assert description["DatasetType"] == "derivative"
    assert description["GeneratedBy"][0]["Name"] == "nl_unwarp"
    assert description["SourceDatasets"][0]["URL"] == study.root.resolve().as_uri()

    sidecar = deriv.get_metadata(str(out / derivative_name(T2W_2D, "corrected")))
    prov = sidecar["NLUnwarpProvenance"]
    from nl_unwarp.io.coilfile import coil_sha256

    assert prov["coil_model"]["sha256"] == coil_sha256(study.coils / "demo_coil.json")
    assert prov["decision"]["action"] == "throughplane" and prov["warp"]["mode"] == "throughplane"
    assert sidecar["Sources"] == [f"bids:raw:{T2W_2D}"]
    assert sidecar["Manufacturer"] == "Fictive Magnetics" and sidecar["SkullStripped"] is False
    assert str(study.coils) not in (out / derivative_name(T2W_2D, "corrected", ext=".json")).read_text()

    # bval/bvec travel along with the dwi, events with the bold.
    dwi_bval = out / derivative_name(DWI, "corrected", ext=".bval")
    assert dwi_bval.read_text() == (study.root / DWI.replace(".nii.gz", ".bval")).read_text()
    assert (out / "sub-01/ses-1/func/sub-01_ses-1_task-rest_events.tsv").exists()
    corrected_dwi = nib.load(out / derivative_name(DWI, "corrected"))
    assert corrected_dwi.shape == nib.load(study.root / DWI).shape
    table = (out / "decisions.tsv").read_text().splitlines()
    assert len(table) == 1 + len(rows) and "skip" in table[[r for r in by_image].index(SOUTH_T1W) + 1]


def test_own_outputs_are_refused_as_inputs(study, tmp_path):
    run(_options(study, tmp_path))
    out = tmp_path / "derivatives"
    # Someone copies a derivative back into the raw dataset as a new run.
    for ext in (".nii.gz", ".json"):
        shutil.copyfile(out / derivative_name(T1W, "corrected", ext=ext),
                        study.root / T1W.replace("_T1w.nii.gz", "_run-2_T1w" + ext))
    plan = build_plan(_options(study, tmp_path))
    (bad,) = plan.problems
    assert bad.relpath.endswith("_run-2_T1w.nii.gz")
    assert "refusing to correct it a second time" in bad.problem


def test_crash_leaves_nothing_half_written_and_rerun_completes(study, tmp_path, monkeypatch):
    real_copy = shutil.copyfile
    calls = {"n": 0}

    def copy_then_crash(src, dst):
        if "_dwi" in str(dst):
            calls["n"] += 1
            if calls["n"] == 2:  # the second file of the dwi's derivatives
                raise OSError("simulated crash: disk full")
        return real_copy(src, dst)

    monkeypatch.setattr(derivatives_module.shutil, "copyfile", copy_then_crash)
    rows, failures = run(_options(study, tmp_path))
    assert len(failures) == 1
    out = tmp_path / "derivatives"
    # The derivatives tree, not reports/: a report page is not a derivative of the image.
    dwi_files = list((out / "sub-01").rglob("sub-01_ses-1_*dwi*"))
    assert dwi_files == []  # none of the dwi's derivatives, not even the ones copied before the crash
    assert list(out.rglob(".*partial*")) == []
    assert (out / derivative_name(T1W, "corrected")).exists()  # the others are complete
    work = tmp_path / "work" / "bids_unwarp_wf"
    warp_result = work / "sub_01_ses_1_T1w_wf" / "make_warp" / "result_make_warp.pklz"
    before = warp_result.stat().st_mtime_ns

    monkeypatch.setattr(derivatives_module.shutil, "copyfile", real_copy)
    rows, failures = run(_options(study, tmp_path))
    assert failures == []
    assert (out / derivative_name(DWI, "corrected")).exists()
    assert (out / derivative_name(DWI, "field")).exists()
    assert warp_result.stat().st_mtime_ns == before  # cached, not recomputed


def test_bad_inputs_are_clear_errors(study, tmp_path):
    (study.root / T1W.replace(".nii.gz", ".json")).unlink()  # missing sidecar
    study.edit_sidecar(T2W_2D, Manufacturer="Other Corp")  # unknown scanner
    plan = build_plan(_options(study, tmp_path))
    problems = {r.relpath: r.problem for r in plan.problems}
    assert "no sidecar metadata" in problems[T1W]
    assert "unknown scanner" in problems[T2W_2D]
    with pytest.raises(InputError, match="2 image\\(s\\) cannot be planned"):
        run(_options(study, tmp_path), plan=plan)
    assert not (tmp_path / "derivatives").exists()  # nothing computed, nothing written


def test_missing_table_position_error_policy(study, tmp_path):
    study.edit_config(lambda doc: doc["policy"].update(missing_table_position="error"))
    study.edit_sidecar(T1W, TablePosition=None)
    (bad,) = build_plan(_options(study, tmp_path)).problems
    assert bad.relpath == T1W and "TablePosition missing" in bad.problem


def test_paths_checked(study, tmp_path, capsys):
    not_bids = tmp_path / "plain"
    not_bids.mkdir()
    assert main([str(not_bids), str(tmp_path / "o"), "participant", "--site-config",
                 str(study.site_config)]) == 1
    assert "not a BIDS dataset" in capsys.readouterr().err
    assert main([str(study.root), str(study.root / "sub-01" / "out"), "participant",
                 "--site-config", str(study.site_config)]) == 1
    assert "inside the input dataset" in capsys.readouterr().err
    # The BIDS place for derivatives is allowed (and ignored by indexing).
    plan = build_plan(RunOptions(bids_dir=study.root, output_dir=study.root / "derivatives" / "nlu",
                                 site_config=study.site_config))
    assert len(plan.rows) == 3 * IMAGES_PER_SESSION


def test_plan_command_prints_the_table(study, capsys):
    assert main(["plan", str(study.root), "--site-config", str(study.site_config)]) == 0
    text = capsys.readouterr().out
    line = next(x for x in text.splitlines() if x.startswith(SOUTH_T1W))
    assert "southbay-halyard" in line and "skip" in line and "corrected in 3D" in line
    assert main(["plan", str(study.root), "--site-config", str(study.site_config), "--json",
                 "--participant-label", "sub-02", "--suffix", "T2w"]) == 0
    (row,) = json.loads(capsys.readouterr().out)
    assert row["image"] == "sub-02/ses-1/anat/sub-02_ses-1_acq-2d_T2w.nii.gz"
    assert row["decision"]["action"] == "throughplane" and "coil_path" not in row["decision"]


def test_bids_app_cli_runs(study, tmp_path, capsys):
    code = main([str(study.root), str(tmp_path / "cli_out"), "participant", "--site-config",
                 str(study.site_config), "-w", str(tmp_path / "cli_work"), "--plugin", "Linear",
                 "--participant-label", "01", "--session-label", "1", "--datatype", "anat",
                 "--quiet"])
    assert code == 0
    out = capsys.readouterr().out
    assert T1W in out and T2W_2D in out and DWI not in out
    corrected = np.asarray(nib.load(tmp_path / "cli_out" / derivative_name(T1W, "corrected")).dataobj)
    assert np.isfinite(corrected).all() and corrected.max() > 0.5
    assert Path(tmp_path / "cli_out" / "decisions.tsv").exists()


def test_top_level_pipeline_script_builds(study, tmp_path):
    import runpy

    script = runpy.run_path(str(Path(__file__).parents[1] / "workflows" / "multisite_bids.py"))
    plan, workflow = script["build"](study.root, tmp_path / "derivatives", study.site_config,
                                     tmp_path / "work")
    assert len(plan.rows) == 3 * IMAGES_PER_SESSION
    assert sum(n.endswith("_sink") for n in workflow.list_node_names()) == len(plan.rows) - 1


def test_bids_app_field_spacing(study, tmp_path, capsys):
    """``--field-spacing``: the field derivative at that voxel size (nibabel reads its header),
    recorded in the provenance parameters and in the image workflow's methods text; a voxel size
    <= 0 is refused naming the flag, before anything is written."""
    from nl_unwarp.workflows.unwarp import init_unwarp_wf

    assert "stored on a 3 mm grid" in init_unwarp_wf(field_spacing_mm=3.0).__desc__
    assert "stored on a" not in init_unwarp_wf().__desc__
    args = [str(study.root), str(tmp_path / "out"), "participant", "--site-config", str(study.site_config),
            "-w", str(tmp_path / "work"), "--plugin", "Linear", "--participant-label", "01",
            "--session-label", "1", "--suffix", "T1w", "--quiet"]
    assert main(args + ["--field-spacing", "0"]) == 1
    assert "--field-spacing" in capsys.readouterr().err and not (tmp_path / "out").exists()
    # The library entry refuses it too (one-line InputError, not a nipype trait error).
    from nl_unwarp.bids.app import RunOptions, run
    from nl_unwarp.errors import InputError

    with pytest.raises(InputError, match="--field-spacing"):
        run(RunOptions(bids_dir=study.root, output_dir=tmp_path / "out", site_config=study.site_config,
                       field_spacing_mm=-1.0))
    assert not (tmp_path / "out").exists()
    assert main(args + ["--field-spacing", "3"]) == 0
    out = tmp_path / "out"
    field = nib.load(out / derivative_name(T1W, "field"))
    np.testing.assert_allclose(field.header.get_zooms()[:3], 3.0, rtol=1e-6)
    sidecar = json.loads((out / derivative_name(T1W, "corrected", ext=".json")).read_text())
    assert sidecar["NLUnwarpProvenance"]["parameters"]["field_spacing_mm"] == 3.0
    corrected = np.asarray(nib.load(out / derivative_name(T1W, "corrected")).dataobj)
    assert np.isfinite(corrected).all() and corrected.max() > 0.5
