"""Coil model files (nl_unwarp.io.coilfile): round trips, the strict loader, table import.

Outside references: Python's float repr (shortest string that round-trips,
Python docs / IEEE 754), ``scipy.special.lpmv`` for tables given in other
normalisations, the definition of a linear gradient (B_z = G x) for field
units, and JSON Schema draft 2020-12 (``jsonschema``, when installed) for the
published schema in ``docs/coil-model.schema.json``.
"""

from __future__ import annotations

import json
from math import factorial, sqrt
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import special

from nl_unwarp.coil import AXES, AxisExpansion, CoilModel
from nl_unwarp.demo import demo_coil_path
from nl_unwarp.errors import InputError
from nl_unwarp.harmonics import NORMALISATIONS
from nl_unwarp.io import coilfile
from nl_unwarp.io.coilfile import (
    FORMAT_NAME,
    FORMAT_VERSION,
    MAX_DEGREE,
    SOURCE_KINDS,
    coil_sha256,
    import_table,
    load_coil,
    save_coil,
)

SCHEMA_PATH = Path(__file__).resolve().parents[1] / "docs" / "coil-model.schema.json"
#: Normalisation conversions and field-unit scaling: a few float64 products.
CONVERSION_TOL = 1e-12
#: Encoded positions (mm, |r| <= 200 mm) from the loaded model vs. a direct
#: scipy evaluation of the table as given: float64 rounding of ~15 terms.
ENCODE_TOL_MM = 1e-9

HYPOTHESIS = settings(max_examples=40, deadline=None, derandomize=True, database=None,
                      suppress_health_check=[HealthCheck.function_scoped_fixture])


def _demo_document() -> dict:
    return json.loads(demo_coil_path().read_text(encoding="utf-8"))


def _write(tmp_path: Path, doc, name: str = "coil.json") -> Path:
    path = tmp_path / name
    path.write_text(doc if isinstance(doc, str) else json.dumps(doc, indent=2), encoding="utf-8")
    return path


def _load_error(path: Path) -> str:
    with pytest.raises(InputError) as info:
        load_coil(path)
    message = str(info.value)
    assert str(path) in message, message  # every message names the file
    return message


# --- exact round trip -------------------------------------------------------

finite = st.floats(allow_nan=False, allow_infinity=False)
term_keys = st.tuples(st.integers(0, 12), st.integers(0, 12), st.booleans())


@st.composite
def coil_models(draw):
    axes = {}
    for name in AXES:
        degree = draw(st.integers(1, 12))
        alpha, beta = np.zeros((degree + 1,) * 2), np.zeros((degree + 1,) * 2)
        for (n, m, is_sin), value in draw(st.dictionaries(term_keys, finite, max_size=10)).items():
            n, m = min(max(n, m), degree), min(n, m, degree)
            (beta if is_sin and m else alpha)[n, m] = value
        linear = 1.0 + draw(st.floats(-0.2, 0.2))
        {"x": alpha, "y": beta, "z": alpha}[name][1, 0 if name == "z" else 1] = linear
        r0 = draw(st.floats(1.0, 1000.0))
        axes[name] = AxisExpansion(alpha, beta, r0, draw(st.floats(1.0, 1000.0)))
    source = {"kind": draw(st.sampled_from(SOURCE_KINDS)), "description": draw(st.text(max_size=40)),
              "date": draw(st.text(max_size=12))}
    return CoilModel(axes=axes, label=draw(st.text(max_size=30)), source=source)


def _bits(array: np.ndarray) -> np.ndarray:
    # Zeros are not written: -0.0 comes back as +0.0 (adding +0.0 maps -0.0 to +0.0).
    return (np.asarray(array, dtype=np.float64) + 0.0).view(np.uint64)


@HYPOTHESIS
@given(model=coil_models())
def test_save_load_round_trip_is_exact(model, tmp_path_factory):
    path = save_coil(model, tmp_path_factory.mktemp("rt") / "coil.json")
    loaded = load_coil(path)
    assert loaded.label == model.label
    assert loaded.source == model.source
    for name in AXES:
        want, got = model.axes[name], loaded.axes[name]
        size = max(want.degree, 1) + 1
        for table_want, table_got in ((want.alpha, got.alpha), (want.beta, got.beta)):
            assert not np.any(table_want[size:]) and not np.any(table_want[:, size:])
            np.testing.assert_array_equal(_bits(table_got), _bits(table_want[:size, :size]))
        assert got.reference_radius_mm == want.reference_radius_mm
        assert got.valid_radius_mm == want.valid_radius_mm
    # Saving the loaded model again gives the same bytes.
    again = save_coil(loaded, path.with_name("again.json"))
    assert coil_sha256(again) == coil_sha256(path)


def test_round_trip_keeps_bracketed_text_in_descriptions(tmp_path, demo_coil):
    # A description that looks like a coefficient row must survive verbatim.
    demo_coil.source["description"] = "see table [1,  2,  3] and [4,5,6 ]"
    demo_coil.label = "[7,   8, 9]"
    loaded = load_coil(save_coil(demo_coil, tmp_path / "c.json"))
    assert loaded.source["description"] == "see table [1,  2,  3] and [4,5,6 ]"
    assert loaded.label == "[7,   8, 9]"


def test_demo_file_loads_with_expected_linear_terms(demo_coil):
    for name in AXES:
        assert demo_coil.axes[name].linear_coefficient(name) == 1.0
        assert demo_coil.axes[name].reference_radius_mm == 250.0
    assert demo_coil.degree == 13


# --- strict loader ------------------------------------------------------------

def _set(path: tuple, value):
    def edit(doc):
        obj = doc
        for key in path[:-1]:
            obj = obj[key]
        obj[path[-1]] = value
    return edit


def _delete(path: tuple):
    def edit(doc):
        obj = doc
        for key in path[:-1]:
            obj = obj[key]
        del obj[path[-1]]
    return edit


def _append(path: tuple, row):
    def edit(doc):
        obj = doc
        for key in path:
            obj = obj[key]
        obj.append(row)
    return edit


BAD_DOCUMENTS = {
    # name: (edit, substrings the message must contain)
    "unknown top key": (_set(("colour",), "red"), ["unknown key 'colour'"]),
    "unknown source key": (_set(("source", "author"), "me"), ["unknown key 'source.author'"]),
    "unknown axis key": (_set(("axes", "y", "gain"), 1.0), ["unknown key 'axes.y.gain'"]),
    "unknown axis name": (_set(("axes", "w"), {}), ["unknown key 'axes.w'"]),
    "missing axis": (_delete(("axes", "z")), ["axis 'z' missing", "'axes'"]),
    "missing axes": (_delete(("axes",)), ["'axes'"]),
    "negative radius": (_set(("axes", "x", "reference_radius_mm"), -250.0),
                        ["axis x", "'reference_radius_mm'", "positive"]),
    "zero valid radius": (_set(("axes", "y", "valid_radius_mm"), 0),
                          ["axis y", "'valid_radius_mm'", "positive"]),
    "radius as text": (_set(("axes", "z", "reference_radius_mm"), "250"),
                       ["axis z", "'reference_radius_mm'", "not a number"]),
    "missing radius": (_delete(("axes", "z", "valid_radius_mm")), ["axis z", "'valid_radius_mm'"]),
    "linear term far from 1": (_set(("axes", "z", "cos", 0), [1, 0, 1000.0]),
                               ["axis z", "linear term cos n=1 m=0", "1000"]),
    "linear term missing": (_set(("axes", "y", "sin"), [[3, 1, 0.01]]),
                            ["axis y", "linear term sin n=1 m=1"]),
    "degree too high": (_append(("axes", "x", "cos"), [MAX_DEGREE + 1, 1, 0.001]),
                        ["axis x", "'cos'", f"n={MAX_DEGREE + 1}", "out of range"]),
    "order above degree": (_append(("axes", "y", "sin"), [2, 3, 0.001]),
                           ["axis y", "'sin'", "n=2 m=3", "out of range"]),
    "negative order": (_append(("axes", "x", "cos"), [2, -1, 0.001]), ["axis x", "'cos'", "m=-1"]),
    "sin with m=0": (_append(("axes", "z", "sin"), [3, 0, 0.001]), ["axis z", "'sin'", "m=0"]),
    "duplicate term": (_append(("axes", "x", "cos"), [3, 1, -0.072]),
                       ["axis x", "'cos'", "n=3 m=1", "twice"]),
    "float degree": (_append(("axes", "x", "cos"), [3.0, 1, 0.5]), ["axis x", "'cos'", "[3.0, 1, 0.5]"]),
    "short row": (_append(("axes", "y", "sin"), [3, 1]), ["axis y", "'sin'", "[3, 1]"]),
    "text value": (_append(("axes", "y", "sin"), [4, 1, "0.1"]), ["axis y", "'sin'", "[4, 1, '0.1']"]),
    "terms not a list": (_set(("axes", "z", "cos"), {"1": 1.0}), ["axis z", "'cos'", "list"]),
    "wrong format": (_set(("format",), "other-coil"), ["'format'", FORMAT_NAME, "other-coil"]),
    "wrong version": (_set(("format_version",), 2), ["'format_version'", "2"]),
    "missing version": (_delete(("format_version",)), ["'format_version'"]),
    "wrong frame": (_set(("frame",), "ras"), ["'frame'", "device"]),
    "bad normalisation": (_set(("axes", "x", "normalisation"), "semi"), ["axis x", "'normalisation'"]),
    "bad phase flag": (_set(("axes", "x", "condon_shortley"), "no"), ["axis x", "'condon_shortley'"]),
    "bad source kind": (_set(("source", "kind"), "guess"), ["'source.kind'", "design"]),
    "source not object": (_set(("source",), "design"), ["'source'", "object"]),
    "axis not object": (_set(("axes", "y"), [1, 2]), ["axis y", "object"]),
    "label not text": (_set(("label",), {"a": 1}), ["'label'", "string"]),
    "description not text": (_set(("source", "description"), 5), ["'source.description'", "string"]),
}


@pytest.mark.parametrize("case", sorted(BAD_DOCUMENTS))
def test_strict_loader_names_file_axis_and_key(case, tmp_path):
    edit, expected = BAD_DOCUMENTS[case]
    doc = _demo_document()
    edit(doc)
    message = _load_error(_write(tmp_path, doc))
    for part in expected:
        assert part in message, (case, message)


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
@pytest.mark.parametrize("where", ["term", "radius"])
def test_non_finite_literals_rejected_with_location(literal, where, tmp_path):
    # Python's json module accepts these non-standard literals by default
    # (Python docs, json); RFC 8259 has no such numbers.
    doc = _demo_document()
    if where == "term":
        doc["axes"]["z"]["cos"][1] = [3, 0, "@CONSTANT@"]
        expected = ["axis z", "'cos'", literal]
    else:
        doc["axes"]["y"]["valid_radius_mm"] = "@CONSTANT@"
        expected = ["axis y", "'valid_radius_mm'", literal]
    text = json.dumps(doc, indent=2).replace('"@CONSTANT@"', literal)
    message = _load_error(_write(tmp_path, text))
    for part in expected:
        assert part in message, message


@pytest.mark.parametrize("text", ["", "{", '{"format": "nl_unwarp-coil",', "[1, 2, 3]", "null", "\x00\x01"])
def test_truncated_or_invalid_json(text, tmp_path):
    message = _load_error(_write(tmp_path, text))
    assert "JSON" in message or "object" in message, message


def test_undecodable_bytes(tmp_path):
    path = tmp_path / "coil.json"
    path.write_bytes(b'{"format": "\xff\xfe"}')
    assert "JSON" in _load_error(path)


def test_missing_file(tmp_path):
    message = _load_error(tmp_path / "nowhere" / "coil.json")
    assert "not found" in message


def test_optional_keys_take_documented_defaults(tmp_path):
    doc = _demo_document()
    del doc["label"], doc["source"], doc["frame"]
    for name in AXES:
        del doc["axes"][name]["normalisation"], doc["axes"][name]["condon_shortley"]
    del doc["axes"]["x"]["sin"], doc["axes"]["y"]["cos"]
    model = load_coil(_write(tmp_path, doc))
    reference = load_coil(demo_coil_path())
    assert model.label == "unnamed" and model.source == {}
    for name in AXES:
        np.testing.assert_array_equal(model.axes[name].alpha, reference.axes[name].alpha)
        np.testing.assert_array_equal(model.axes[name].beta, reference.axes[name].beta)


def test_integer_values_are_accepted(tmp_path):
    doc = _demo_document()
    doc["axes"]["x"]["cos"][0] = [1, 1, 1]
    doc["axes"]["x"]["reference_radius_mm"] = 250
    model = load_coil(_write(tmp_path, doc))
    assert model.axes["x"].alpha[1, 1] == 1.0 and model.axes["x"].reference_radius_mm == 250.0


# --- files in other normalisations --------------------------------------------

def _schmidt_factor(n: int, m: int) -> float:
    """Schmidt / unnormalised ratio from its definition (CONVENTIONS.md section 2)."""
    return sqrt((2 - (m == 0)) * factorial(n - m) / factorial(n + m))


def _field_by_scipy(terms, r0_mm: float, points_mm: np.ndarray, *, condon_shortley: bool) -> np.ndarray:
    """R0 sum a (rho/R0)^n P_n^m(cos theta) cos/sin(m phi), unnormalised, via scipy.special.lpmv."""
    x, y, z = points_mm.T
    rho = np.sqrt(x * x + y * y + z * z)
    cos_theta = np.where(rho > 0, z / np.where(rho > 0, rho, 1.0), 1.0)
    phi = np.arctan2(y, x)
    total = np.zeros(len(points_mm))
    for n, m, kind, value in terms:
        # lpmv carries the Condon-Shortley phase (scipy docs).
        p = special.lpmv(m, n, cos_theta) * (1 if condon_shortley else (-1) ** m)
        total += value * (rho / r0_mm) ** n * p * (np.cos(m * phi) if kind == "cos" else np.sin(m * phi))
    return r0_mm * total


def _demo_rows():
    doc = _demo_document()
    rows = []
    for name in AXES:
        for kind in ("cos", "sin"):
            rows += [(name, n, m, kind, value) for n, m, value in doc["axes"][name][kind]]
    return rows


@pytest.mark.parametrize("condon_shortley", [False, True])
def test_unnormalised_file_loads_as_schmidt(condon_shortley, tmp_path, rng):
    doc = _demo_document()
    terms_by_axis = {}
    for name in AXES:
        ax = doc["axes"][name]
        ax["normalisation"], ax["condon_shortley"] = "unnormalised", condon_shortley
        for kind in ("cos", "sin"):
            phase = (lambda m: (-1) ** m) if condon_shortley else (lambda m: 1)
            ax[kind] = [[n, m, v * _schmidt_factor(n, m) * phase(m)] for n, m, v in ax[kind]]
        terms_by_axis[name] = [(n, m, k, v) for k in ("cos", "sin") for n, m, v in ax[k]]
    model = load_coil(_write(tmp_path, doc))
    reference = load_coil(demo_coil_path())
    pts = rng.uniform(-120, 120, size=(200, 3))
    encoded, _ = model.encode(pts, jacobian=False)
    for c, name in enumerate(AXES):
        np.testing.assert_allclose(model.axes[name].alpha, reference.axes[name].alpha,
                                   rtol=CONVERSION_TOL, atol=0)
        np.testing.assert_allclose(model.axes[name].beta, reference.axes[name].beta,
                                   rtol=CONVERSION_TOL, atol=0)
        direct = _field_by_scipy(terms_by_axis[name], 250.0, pts, condon_shortley=condon_shortley)
        np.testing.assert_allclose(encoded[:, c], direct, rtol=0, atol=ENCODE_TOL_MM)


# --- plain-table import -----------------------------------------------------------

def _table_text(rows, sep: str, header=("axis", "degree", "order", "kind", "value")) -> str:
    lines = [sep.join(header)] + [sep.join(str(v) for v in row) for row in rows]
    return "\n".join(lines) + "\n"


TABLE_KW = dict(reference_radius_mm=250.0, valid_radius_mm=220.0)


@pytest.mark.parametrize("sep", ["\t", ",", ", "])
def test_import_table_schmidt_matches_demo_file(sep, tmp_path):
    path = tmp_path / "table.txt"
    path.write_text(_table_text(_demo_rows(), sep), encoding="utf-8")
    model = import_table(path, normalisation="schmidt", condon_shortley=False, label="t", **TABLE_KW)
    reference = load_coil(demo_coil_path())
    for name in AXES:
        np.testing.assert_array_equal(model.axes[name].alpha, reference.axes[name].alpha)
        np.testing.assert_array_equal(model.axes[name].beta, reference.axes[name].beta)
        assert model.axes[name].valid_radius_mm == 220.0
    assert model.label == "t" and model.source["kind"] == "design"


def test_import_table_unnormalised_with_phase(tmp_path):
    # Schmidt values known (the demo file) -> a table in unnormalised form with
    # the Condon-Shortley phase, built from the definitions, must load back.
    rows = [(a, n, m, k, v * _schmidt_factor(n, m) * (-1) ** m) for a, n, m, k, v in _demo_rows()]
    path = tmp_path / "table.tsv"
    path.write_text(_table_text(rows, "\t"), encoding="utf-8")
    model = import_table(path, normalisation="unnormalised", condon_shortley=True, **TABLE_KW)
    reference = load_coil(demo_coil_path())
    for name in AXES:
        np.testing.assert_allclose(model.axes[name].alpha, reference.axes[name].alpha, rtol=CONVERSION_TOL)
        np.testing.assert_allclose(model.axes[name].beta, reference.axes[name].beta, rtol=CONVERSION_TOL)


def test_import_table_field_units(tmp_path):
    # A gradient G along x is the field B_z = G x (definition of a gradient);
    # in Schmidt form x = R0 C_1^1(r / R0), so its coefficient is A = G R0
    # (R0 in metres, A in mT), and alpha = A / (G R0) (CONVENTIONS.md section 2).
    gradient = 40.0  # mT/m
    r0_m = 0.25
    rows = [("x", 1, 1, "cos", gradient * r0_m), ("x", 3, 1, "cos", -0.72),
            ("y", 1, 1, "sin", gradient * r0_m), ("y", 5, 5, "sin", 0.01),
            ("z", 1, 0, "cos", gradient * r0_m * 1.02), ("z", 3, 0, "cos", -0.94)]
    path = tmp_path / "field.csv"
    path.write_text(_table_text(rows, ","), encoding="utf-8")
    model = import_table(path, normalisation="schmidt", condon_shortley=False, gradient_mT_per_m=gradient,
                         reference_radius_mm=250.0, valid_radius_mm=200.0)
    expected = {("x", 1, 1): 1.0, ("x", 3, 1): -0.072, ("y", 1, 1): 1.0, ("y", 5, 5): 0.001,
                ("z", 1, 0): 1.02, ("z", 3, 0): -0.094}
    for (name, n, m), alpha in expected.items():
        table = model.axes[name].beta if name == "y" else model.axes[name].alpha
        assert table[n, m] == pytest.approx(alpha, rel=CONVERSION_TOL)
    # The encoded x position of the purely linear part is B_z / G: at 100 mm,
    # 40 mT/m * 0.1 m / 40 mT/m = 100 mm, plus the cubic term.
    pts = np.array([[100.0, 0.0, 0.0]])
    encoded, _ = model.encode(pts, jacobian=False)
    cubic = -0.072 * 250.0 * (100.0 / 250.0) ** 3 * _schmidt_factor(3, 1) * 1.5 * (5 * 0.0 - 1)
    assert encoded[0, 0] == pytest.approx(100.0 + cubic, abs=ENCODE_TOL_MM)


BAD_TABLES = {
    "bad header": ("axis\tn\tm\tkind\tvalue\nx\t1\t1\tcos\t1.0\n",
                   ["header", "axis, degree, order, kind, value"]),
    "text degree": ("axis,degree,order,kind,value\nx,1,1,cos,1.0\ny,one,1,sin,1.0\n", ["line 3", "integers"]),
    "missing value": ("axis,degree,order,kind,value\nx,1,1,cos,1.0\ny,1,1,sin\n", ["line 3"]),
    "bad axis": ("axis,degree,order,kind,value\nw,1,1,cos,1.0\n", ["line 2", "axis"]),
    "bad kind": ("axis,degree,order,kind,value\nx,1,1,cos,1.0\nx,3,1,tan,0.1\n", ["line 3", "kind"]),
    "extra column": ("axis,degree,order,kind,value\nx,1,1,cos,1.0,7\n", ["line 2", "column"]),
    "line after blank": ("axis,degree,order,kind,value\nx,1,1,cos,1.0\n\ny,1,1,sin,x\n", ["line 4"]),
    "empty file": ("", ["header"]),
    "order above degree": ("axis,degree,order,kind,value\nx,1,1,cos,1.0\nx,2,3,cos,0.1\n",
                           ["axis x", "n=2 m=3"]),
}


@pytest.mark.parametrize("case", sorted(BAD_TABLES))
def test_import_table_errors_name_the_line(case, tmp_path):
    text, expected = BAD_TABLES[case]
    path = tmp_path / "table.csv"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(InputError) as info:
        import_table(path, normalisation="schmidt", condon_shortley=False, **TABLE_KW)
    message = str(info.value)
    assert str(path) in message
    for part in expected:
        assert part in message, (case, message)


@pytest.mark.parametrize("gradient", [0.0, -40.0, float("nan")])
def test_import_table_rejects_unusable_gradient(gradient, tmp_path):
    path = tmp_path / "field.tsv"
    path.write_text(_table_text(_demo_rows(), "\t"), encoding="utf-8")
    with pytest.raises(InputError, match="gradient_mT_per_m"):
        import_table(path, normalisation="schmidt", condon_shortley=False, gradient_mT_per_m=gradient,
                     **TABLE_KW)


def test_import_table_missing_file(tmp_path):
    with pytest.raises(InputError, match="not found"):
        import_table(tmp_path / "none.tsv", normalisation="schmidt", condon_shortley=False, **TABLE_KW)


# --- the published schema -------------------------------------------------------

def _schema() -> dict:
    return json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))


#: Loader rules JSON Schema cannot state (docs/coil-model-format.md, "Rules
#: beyond the schema"); draft 2020-12 also counts 3.0 as an integer.
BEYOND_SCHEMA = {"duplicate term", "float degree", "linear term far from 1", "linear term missing",
                 "order above degree"}


def test_schema_validates_demo_coil_with_jsonschema():
    # Source: JSON Schema draft 2020-12 as implemented by the jsonschema package.
    jsonschema = pytest.importorskip("jsonschema")
    schema = _schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    validator = jsonschema.Draft202012Validator(schema)
    validator.validate(_demo_document())
    for case, (edit, _) in BAD_DOCUMENTS.items():
        doc = _demo_document()
        edit(doc)
        assert validator.is_valid(doc) == (case in BEYOND_SCHEMA), case


def test_schema_constants_agree_with_loader():
    # Read both: the schema's fixed values and key sets are the loader's.
    schema = _schema()
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    props = schema["properties"]
    assert props["format"]["const"] == FORMAT_NAME
    assert props["format_version"]["const"] == FORMAT_VERSION
    assert set(props) == coilfile._TOP_KEYS
    assert schema["additionalProperties"] is False
    source = schema["$defs"]["source"]
    assert set(source["properties"]) == coilfile._SOURCE_KEYS
    assert source["properties"]["kind"]["enum"] == list(SOURCE_KINDS)
    axes = props["axes"]
    assert sorted(axes["required"]) == sorted(AXES) and set(axes["properties"]) == set(AXES)
    axis = schema["$defs"]["axis"]
    assert set(axis["properties"]) == coilfile._AXIS_KEYS
    assert axis["properties"]["normalisation"]["enum"] == list(NORMALISATIONS)
    assert axis["properties"]["normalisation"]["default"] == "schmidt"
    assert axis["properties"]["condon_shortley"]["default"] is False
    for kind in ("cos", "sin"):
        n_spec, m_spec, _ = schema["$defs"][f"{kind}_term"]["prefixItems"]
        assert n_spec["maximum"] == MAX_DEGREE and m_spec["maximum"] == MAX_DEGREE
        assert m_spec["minimum"] == (1 if kind == "sin" else 0)


def test_schema_required_keys_are_exactly_what_the_loader_requires(tmp_path):
    # Deleting a key the schema requires must fail to load; deleting any
    # other must not (behavioural agreement, no validator needed).
    schema = _schema()
    axis_required = set(schema["$defs"]["axis"]["required"])
    for key in coilfile._TOP_KEYS:
        doc = _demo_document()
        del doc[key]
        path = _write(tmp_path, doc, f"top-{key}.json")
        if key in schema["required"]:
            _load_error(path)
        else:
            load_coil(path)
    for key in coilfile._AXIS_KEYS:
        doc = _demo_document()
        # Delete from an axis whose linear term is not under that key.
        del doc["axes"]["x" if key == "sin" else "y"][key]
        path = _write(tmp_path, doc, f"axis-{key}.json")
        if key in axis_required:
            _load_error(path)
        else:
            load_coil(path)


def test_schema_copy_of_example_document(tmp_path):
    # The example in docs/coil-model-format.md is a loadable file.
    text = (SCHEMA_PATH.parent / "coil-model-format.md").read_text(encoding="utf-8")
    start = text.index("```json\n") + len("```json\n")
    example = text[start:text.index("```", start)]
    model = load_coil(_write(tmp_path, example))
    assert model.axes["z"].alpha[3, 0] != 0
    assert model.source["kind"] in SOURCE_KINDS
