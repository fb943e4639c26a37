"""Sidecar metadata, the site configuration format and the per-image decisions."""

from __future__ import annotations

import json

import numpy as np
import pytest
from bidsgen import BOLD, MOVED_T1W, SOUTH_T1W, SOUTH_T2W_2D, T1W, T2W_2D, make_study

from nl_unwarp.bids.decisions import decide
from nl_unwarp.bids.metadata import read_metadata
from nl_unwarp.bids.plan import index_dataset
from nl_unwarp.bids.siteconfig import load_site_config
from nl_unwarp.errors import InputError

IDENTITY = {"Manufacturer": "Fictive Magnetics", "ManufacturersModelName": "Halyard 60",
            "GradientSetType": "HY60", "PatientPosition": "HFS", "TablePosition": [0, 0, 0]}


@pytest.fixture
def study(tmp_path, monkeypatch):
    return make_study(tmp_path, monkeypatch, simulate=False)


@pytest.fixture
def config(study):
    return load_site_config(study.site_config)


@pytest.mark.parametrize(("key", "value", "expected"), [
    ("NonlinearGradientCorrection", True, True),
    ("NonlinearGradientCorrection", False, False),
    ("NonlinearGradientCorrection", "2D", "2D"),
    ("NonlinearGradientCorrection", "3d", "3D"),
    # The mis-capitalised variant found in PET sidecars (CONVENTIONS.md section 1).
    ("NonLinearGradientCorrection", True, True),
])
def test_correction_flag_values(key, value, expected):
    assert read_metadata({key: value}).correction_flag == expected


def test_bad_flag_names_the_key():
    with pytest.raises(InputError, match="NonlinearGradientCorrection"):
        read_metadata({"NonlinearGradientCorrection": "yes"}, src="x.nii.gz")


def test_configurable_key_names():
    meta = read_metadata({"PatPos": "ffs", "TablePos": [1, 2, 3]},
                         keys={"patient_position": "PatPos", "table_position": "TablePos"})
    assert meta.patient_position == "FFS"
    assert meta.table_position_mm == (1.0, 2.0, 3.0)


def test_inheritance_principle_through_pybids(study):
    # BIDS specification, "The Inheritance Principle": a sidecar higher in the
    # tree applies to every matching file below; the one nearest the file wins
    # key by key.
    (study.root / "T1w.json").write_text(json.dumps({"PatientPosition": "HFP",
                                                      "StationName": "FROM-TOP-LEVEL"}))
    study.edit_sidecar(T1W, PatientPosition=None)
    layout = index_dataset(study.root)
    meta = layout.get_metadata(str(study.root / T1W))
    assert meta["PatientPosition"] == "HFP"
    assert meta["StationName"] == "NORTHFIELD-MR1"
    bold = layout.get_metadata(str(study.root / BOLD))
    assert bold["RepetitionTime"] == 2.0 and bold["Manufacturer"] == "Fictive Magnetics"


def test_most_specific_rule_wins(config):
    # The generic manufacturer rule also matches the Halyard; three fields beat one.
    decision = decide(IDENTITY, config, src="img")
    assert (decision.rule, decision.site, decision.coil_model) == ("southbay-halyard", "southbay",
                                                                  "southbay")
    other = decide(dict(IDENTITY, ManufacturersModelName="Meridian 45"), config, src="img")
    assert other.rule == "fictive-any"


def test_tied_rules_are_reported(study):
    study.edit_config(lambda doc: doc["scanners"].append(
        {"name": "southbay-station", "site": "southbay", "coil_model": "southbay",
         "match": {"manufacturer": "Fictive Magnetics", "model": "Halyard 60", "station": "SB"}}))
    meta = dict(IDENTITY, StationName="SB")
    with pytest.raises(InputError, match="'southbay-halyard' and 'southbay-station' .* match equally"):
        decide(meta, load_site_config(study.site_config), src="img")


def test_unknown_scanner(config):
    with pytest.raises(InputError, match="unknown scanner .*Other Corp"):
        decide(dict(IDENTITY, Manufacturer="Other Corp"), config, src="img")


@pytest.mark.parametrize(("changes", "action", "why"), [
    ({"NonlinearGradientCorrection": False}, "full", "not corrected"),
    ({"NonlinearGradientCorrection": "2D"}, "throughplane", "in-plane"),
    ({"NonlinearGradientCorrection": "3D"}, "skip", "in 3D"),
    ({"ImageType": ["ORIGINAL", "SLICEFIX"]}, "throughplane", "ImageType token"),
    ({"ImageType": ["ORIGINAL", "BLOCKFIX"]}, "skip", "ImageType token"),
    # True alone: the policy's flag_true_means (3D by default).
    ({"NonlinearGradientCorrection": True}, "skip", "True"),
    ({"NonlinearGradientCorrection": True, "ImageType": ["SLICEFIX"]}, "throughplane", "token"),
    # Absent: the demo policy says correct.
    ({}, "full", "site policy: correct"),
])
def test_decision_table(config, changes, action, why):
    decision = decide(dict(IDENTITY, **changes), config, src="img")
    assert decision.action == action
    assert why in decision.reason


def test_flag_absent_policy_error(study):
    study.edit_config(lambda doc: doc["policy"].update(flag_absent="error"))
    with pytest.raises(InputError, match="flag_absent"):
        decide(IDENTITY, load_site_config(study.site_config), src="img")


def test_contradictory_sidecar(config):
    with pytest.raises(InputError, match="contradicts"):
        decide(dict(IDENTITY, NonlinearGradientCorrection=False, ImageType=["BLOCKFIX"]), config, src="img")


def test_missing_table_position_warns_or_fails(study, config):
    meta = dict(IDENTITY)
    meta.pop("TablePosition")
    decision = decide(meta, config, src="img")
    assert decision.table_position_mm is None
    assert any("TablePosition missing" in w for w in decision.warnings)
    study.edit_config(lambda doc: doc["policy"].update(missing_table_position="error"))
    with pytest.raises(InputError, match="TablePosition missing"):
        decide(meta, load_site_config(study.site_config), src="img")


def test_our_outputs_are_refused(config):
    with pytest.raises(InputError, match="refusing to correct it a second time"):
        decide(dict(IDENTITY, NLUnwarpProvenance={"software": {}}), config, src="img")


def test_thick_and_oblique_2d_slices_warn(config):
    meta = dict(IDENTITY, MRAcquisitionType="2D", NonlinearGradientCorrection="2D")
    thick = np.diag([1.0, 1.0, 12.0, 1.0])
    assert any("12.0 mm thick" in w for w in decide(meta, config, src="i", affine=thick).warnings)
    angle = np.radians(20.0)
    rot = np.array([[1, 0, 0], [0, np.cos(angle), -np.sin(angle)], [0, np.sin(angle), np.cos(angle)]])
    oblique = np.eye(4)
    oblique[:3, :3] = rot @ np.diag([1.0, 1.0, 3.0])
    warnings = decide(meta, config, src="i", affine=oblique).warnings
    assert any("oblique by 20.0 deg" in w for w in warnings)
    assert not any("thick" in w for w in warnings)


def test_coil_path_from_unset_variable(study, monkeypatch, config):
    monkeypatch.delenv("NLU_COIL_DIR")
    config = load_site_config(study.site_config)
    with pytest.raises(InputError, match="NLU_COIL_DIR is not set"):
        decide(IDENTITY, config, src="img")


def test_pinned_sha256_mismatch(study):
    study.edit_config(lambda doc: doc["coil_models"]["southbay"].update(sha256="0" * 64))
    with pytest.raises(InputError, match="SHA-256 differs"):
        decide(IDENTITY, load_site_config(study.site_config), src="img")


@pytest.mark.parametrize(("edit", "message"), [
    (lambda d: d.update(format="other"), "key 'format'"),
    (lambda d: d.update(colour="red"), "unknown key 'colour'"),
    (lambda d: d["scanners"][0].update(coil_model="nope"), "not under coil_models"),
    (lambda d: d["scanners"][0]["match"].update(shoe_size="9"), "not an identity field"),
    (lambda d: d["policy"].update(flag_absent="maybe"), "flag_absent"),
])
def test_config_errors_name_the_key(study, edit, message):
    study.edit_config(edit)
    with pytest.raises(InputError, match=message):
        load_site_config(study.site_config)


def test_generated_dataset_decisions(study, config):
    layout = index_dataset(study.root)
    expected = {T1W: "full", T2W_2D: "throughplane", BOLD: "full", MOVED_T1W: "full",
                SOUTH_T1W: "skip", SOUTH_T2W_2D: "throughplane"}
    for rel, action in expected.items():
        path = str(study.root / rel)
        assert decide(layout.get_metadata(path), config, src=path).action == action
