"""Phantom definition files (nl_unwarp.io.phantomdef, docs/phantom-format.md).

The format is JSON (RFC 8259): the shipped demo is read back with the standard
library's ``json`` and compared field by field; NaN/Infinity literals (not JSON) are
refused. Every bad file gives one line naming the file and the field.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy.spatial import cKDTree
from scipy.spatial.transform import Rotation

from nl_unwarp.errors import InputError
from nl_unwarp.io.atomic import OutputSet
from nl_unwarp.io.phantomdef import (
    MARKER_TABLE_COLUMNS,
    demo_phantom_path,
    load_phantom_definition,
    write_marker_table,
)
from nl_unwarp.markers import proper_rotations_24


def _doc(**changes) -> dict:
    doc = {"format": "nl_unwarp-phantom", "format_version": 1, "name": "test design",
           "body": {"shape": "sphere", "radius_mm": 100.0},
           "markers": [{"id": f"m{k}", "position_mm": [20.0 * k - 30.0, 0.0, 0.0], "diameter_mm": 6.0}
                       for k in range(4)] + [{"position_mm": [0.0, 30.0, 10.0], "diameter_mm": 8.0}]}
    doc.update(changes)
    return doc


def _write(tmp_path: Path, doc, name="phantom.json") -> Path:
    path = tmp_path / name
    path.write_text(doc if isinstance(doc, str) else json.dumps(doc), encoding="utf-8")
    return path


def test_demo_phantom_reads_as_json_says():
    path = demo_phantom_path()
    raw = json.loads(path.read_text(encoding="utf-8"))
    d = load_phantom_definition(path)
    assert "fictional" in d.name.lower()
    assert len(d.ids) == len(raw["markers"]) == 464
    np.testing.assert_array_equal(d.markers_mm, [m["position_mm"] for m in raw["markers"]])
    np.testing.assert_array_equal(d.diameters_mm, [m["diameter_mm"] for m in raw["markers"]])
    assert d.body == {"shape": "sphere", "radius_mm": 140.0}
    assert d.typical_diameter_mm == 6.0
    # Markers at least two diameters apart (docs/phantom-format.md), by scipy's KD-tree.
    dist, _ = cKDTree(d.markers_mm).query(d.markers_mm, k=2)
    assert dist[:, 1].min() >= 2 * d.diameters_mm.max()


def test_demo_phantom_has_no_rotational_symmetry():
    # The orientation feature: no rotation of the cube group maps the marker set onto itself.
    d = load_phantom_definition(demo_phantom_path())
    tree = cKDTree(d.markers_mm)
    for rot in proper_rotations_24():
        dist, _ = tree.query(d.markers_mm @ rot.T)
        if np.allclose(rot, np.eye(3)):
            assert dist.max() == 0.0
        else:
            assert dist.max() > 5.0
    # scipy's octahedral group agrees with ours (scipy documentation).
    assert len(Rotation.create_group("O")) == len(proper_rotations_24())


def test_cylinder_body_and_default_ids(tmp_path):
    doc = _doc(body={"shape": "cylinder", "radius_mm": 50.0, "length_mm": 80.0})
    d = load_phantom_definition(_write(tmp_path, doc))
    assert d.body == {"shape": "cylinder", "radius_mm": 50.0, "length_mm": 80.0}
    assert d.ids[-1] == "4"
    no_body = _doc()
    del no_body["body"]
    assert load_phantom_definition(_write(tmp_path, no_body)).body is None


BAD = [
    ("missing file", None, "not found"),
    ("not json", "{", "not valid JSON"),
    ("nan literal", '{"format": NaN}', "NaN is not a number"),
    ("format", _doc(format="other"), "field 'format'"),
    ("version", _doc(format_version=2), "field 'format_version'"),
    ("version bool", _doc(format_version=True), "field 'format_version'"),
    ("unknown top", _doc(colour="red"), "unknown field 'colour'"),
    ("no name", _doc(name=""), "field 'name'"),
    ("body shape", _doc(body={"shape": "cube", "radius_mm": 3.0}), "field 'body.shape'"),
    ("body radius", _doc(body={"shape": "sphere", "radius_mm": -1}), "field 'body.radius_mm'"),
    ("cylinder length", _doc(body={"shape": "cylinder", "radius_mm": 50.0}), "field 'body.length_mm'"),
    ("markers not list", _doc(markers={}), "field 'markers'"),
    ("too few", _doc(markers=_doc()["markers"][:3]), "at least 4"),
]


def _marker_case(index, **changes):
    doc = _doc()
    doc["markers"][index] = {**doc["markers"][index], **changes}
    return doc


BAD += [
    ("position length", _marker_case(2, position_mm=[1.0, 2.0]), "field 'markers[2].position_mm'"),
    ("position string", _marker_case(1, position_mm=[1.0, "2", 3.0]), "field 'markers[1].position_mm[1]'"),
    ("diameter zero", _marker_case(3, diameter_mm=0), "field 'markers[3].diameter_mm'"),
    ("diameter missing", _doc(markers=[*_doc()["markers"][:4], {"position_mm": [0, 50, 0]}]),
     "field 'markers[4].diameter_mm' missing"),
    ("unknown marker key", _marker_case(0, colour=1), "unknown field 'markers[0].colour'"),
    ("duplicate id", _marker_case(1, id="m0"), "field 'markers[1].id'"),
    ("overlap", _marker_case(1, position_mm=[-27.0, 0.0, 0.0]), "overlaps"),
    ("outside body", _marker_case(0, position_mm=[0.0, 0.0, 98.0]), "outside the sphere body"),
]


@pytest.mark.parametrize("case, doc, expected", BAD, ids=[b[0] for b in BAD])
def test_bad_definitions_fail_on_one_line_naming_file_and_field(tmp_path, case, doc, expected):
    path = tmp_path / "missing.json" if doc is None else _write(tmp_path, doc)
    with pytest.raises(InputError) as info:
        load_phantom_definition(path)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(str(path))
    assert expected in message


def test_marker_table_columns(tmp_path):
    rows = [{"scan": "a.nii.gz", "marker": 1, "definition_mm": [1.0, 2.0, 3.0],
             "detected_ras_mm": [4.0, 5.0, 6.0], "predicted_ras_mm": [4.1, 5.1, 6.1],
             "residual_ras_mm": [0.1, 0.1, 0.1], "residual_mm": 0.173, "rigid_residual_mm": 1.0,
             "weight": 0.9, "outlier": False}]
    with OutputSet() as out:
        write_marker_table(out, tmp_path / "m.tsv", rows, ["m0", "m1"])
    lines = (tmp_path / "m.tsv").read_text().splitlines()
    assert lines[0].split("\t") == list(MARKER_TABLE_COLUMNS)
    values = dict(zip(MARKER_TABLE_COLUMNS, lines[1].split("\t"), strict=True))
    assert values["id"] == "m1" and values["detected_s_mm"] == "6.0000" and values["outlier"] == "no"
