"""Phantom definition files (our own JSON format) and the per-marker residual table.

The format is specified in ``docs/phantom-format.md``. The loader is strict:
every problem raises :class:`~nl_unwarp.errors.InputError` naming the file and
the field (``markers[12].diameter_mm``), on one line.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

import numpy as np
from scipy.spatial import cKDTree

from ..errors import InputError
from .atomic import OutputSet
from .text import read_input_text

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "MARKER_TABLE_COLUMNS",
    "PhantomDefinition",
    "demo_phantom_path",
    "load_phantom_definition",
    "marker_table_text",
    "write_marker_table",
]

FORMAT_NAME = "nl_unwarp-phantom"
FORMAT_VERSION = 1
#: Fewest markers a definition may have: a rigid pose needs three points not on
#: a line; a coil fit needs many more (checked when fitting).
MIN_MARKERS = 4
BODY_SHAPES = {"sphere": {"shape", "radius_mm"}, "cylinder": {"shape", "radius_mm", "length_mm"}}

_TOP_KEYS = {"format", "format_version", "name", "description", "body", "markers"}
_MARKER_KEYS = {"id", "position_mm", "diameter_mm"}


@dataclass
class PhantomDefinition:
    """A phantom design: marker centres and diameters in the phantom's own frame.

    Attributes
    ----------
    name, description : str
    markers_mm : (N, 3) ndarray
        Marker centres, phantom frame, mm.
    diameters_mm : (N,) ndarray
        Marker diameters, mm.
    ids : list of str
        Marker names (default: their index).
    body : dict or None
        ``{"shape": "sphere", "radius_mm": R}`` or
        ``{"shape": "cylinder", "radius_mm": R, "length_mm": L}`` (axis along z),
        centred on the frame's origin.
    source : str
        The file it was read from.
    """

    name: str
    description: str
    markers_mm: np.ndarray
    diameters_mm: np.ndarray
    ids: list
    body: dict | None
    source: str = ""

    @property
    def typical_diameter_mm(self) -> float:
        """Median marker diameter, mm (what detection is tuned to)."""
        return float(np.median(self.diameters_mm))


def demo_phantom_path() -> Path:
    """Path of the shipped, invented demo phantom design."""
    return Path(str(resources.files("nl_unwarp") / "data" / "demo_phantom.json"))


def _number(value, src: str, key: str, *, positive: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(src, f"field '{key}' must be a finite number, got {value!r}")
    if positive and value <= 0:
        raise InputError(src, f"field '{key}' must be positive (mm), got {value!r}")
    return float(value)


def _unknown(obj: dict, allowed: set, src: str, prefix: str) -> None:
    extra = sorted(set(obj) - allowed)
    if extra:
        raise InputError(src, f"unknown field '{prefix}{extra[0]}' (allowed: {', '.join(sorted(allowed))})")


def _body(doc, src: str) -> dict | None:
    if doc is None:
        return None
    if not isinstance(doc, dict):
        raise InputError(src, "field 'body' must be an object")
    shape = doc.get("shape")
    if shape not in BODY_SHAPES:
        raise InputError(src, f"field 'body.shape' must be one of {', '.join(BODY_SHAPES)}, got {shape!r}")
    _unknown(doc, BODY_SHAPES[shape], src, "body.")
    out = {"shape": shape}
    for key in sorted(BODY_SHAPES[shape] - {"shape"}):
        if key not in doc:
            raise InputError(src, f"field 'body.{key}' missing (a {shape} needs it)")
        out[key] = _number(doc[key], src, f"body.{key}", positive=True)
    return out


def _marker(doc, src: str, k: int) -> tuple[str, list, float]:
    where = f"markers[{k}]"
    if not isinstance(doc, dict):
        raise InputError(src, f"field '{where}' must be an object with position_mm and diameter_mm")
    _unknown(doc, _MARKER_KEYS, src, f"{where}.")
    pos = doc.get("position_mm")
    if not isinstance(pos, list) or len(pos) != 3:
        raise InputError(src, f"field '{where}.position_mm' must be a list of three numbers (mm)")
    xyz = [_number(v, src, f"{where}.position_mm[{i}]") for i, v in enumerate(pos)]
    if "diameter_mm" not in doc:
        raise InputError(src, f"field '{where}.diameter_mm' missing")
    diameter = _number(doc["diameter_mm"], src, f"{where}.diameter_mm", positive=True)
    ident = doc.get("id", str(k))
    if not isinstance(ident, str) or not ident:
        raise InputError(src, f"field '{where}.id' must be a non-empty string")
    return ident, xyz, diameter


def _inside_body(body: dict, pts: np.ndarray, radii: np.ndarray) -> np.ndarray:
    """Whether each marker lies wholly inside the body."""
    if body["shape"] == "sphere":
        return np.linalg.norm(pts, axis=1) + radii <= body["radius_mm"]
    return (np.hypot(pts[:, 0], pts[:, 1]) + radii <= body["radius_mm"]) & \
        (np.abs(pts[:, 2]) + radii <= body["length_mm"] / 2)


def definition_from_document(doc, src: str) -> PhantomDefinition:
    """Validate a parsed phantom document (see :func:`load_phantom_definition`)."""
    if not isinstance(doc, dict):
        raise InputError(src, "top level must be a JSON object")
    _unknown(doc, _TOP_KEYS, src, "")
    if doc.get("format") != FORMAT_NAME:
        raise InputError(src, f"field 'format' must be {FORMAT_NAME!r}, got {doc.get('format')!r}")
    version = doc.get("format_version")
    if isinstance(version, bool) or version != FORMAT_VERSION:
        raise InputError(src, f"field 'format_version': this version reads {FORMAT_VERSION}, got {version!r}")
    name = doc.get("name")
    if not isinstance(name, str) or not name.strip():
        raise InputError(src, "field 'name' missing or not a non-empty string")
    description = doc.get("description", "")
    if not isinstance(description, str):
        raise InputError(src, "field 'description' must be a string")
    body = _body(doc.get("body"), src)
    rows = doc.get("markers")
    if not isinstance(rows, list):
        raise InputError(src, "field 'markers' missing or not a list")
    if len(rows) < MIN_MARKERS:
        raise InputError(src, f"field 'markers': {len(rows)} markers; a definition needs at least "
                              f"{MIN_MARKERS}")
    parsed = [_marker(row, src, k) for k, row in enumerate(rows)]
    ids = [p[0] for p in parsed]
    seen: dict[str, int] = {}
    for k, ident in enumerate(ids):
        if ident in seen:
            raise InputError(src, f"field 'markers[{k}].id': {ident!r} already used by "
                                  f"markers[{seen[ident]}]")
        seen[ident] = k
    pts = np.array([p[1] for p in parsed])
    diam = np.array([p[2] for p in parsed])
    dist, idx = cKDTree(pts).query(pts, k=2)
    overlap = dist[:, 1] < 0.5 * (diam + diam[idx[:, 1]])
    if overlap.any():
        k = int(np.nonzero(overlap)[0][0])
        raise InputError(src, f"field 'markers[{k}].position_mm': marker overlaps markers[{int(idx[k, 1])}] "
                              f"(centres {dist[k, 1]:.3g} mm apart)")
    if body is not None:
        inside = _inside_body(body, pts, 0.5 * diam)
        if not inside.all():
            k = int(np.nonzero(~inside)[0][0])
            raise InputError(src, f"field 'markers[{k}].position_mm': marker reaches outside the "
                                  f"{body['shape']} body")
    return PhantomDefinition(name.strip(), description, pts, diam, ids, body, src)


def load_phantom_definition(path: str | Path) -> PhantomDefinition:
    """Load and validate a phantom definition file.

    Raises
    ------
    InputError
        Naming the file and the field of the first problem found.
    """
    src = str(path)
    text = read_input_text(path, "phantom definition file")

    def constant(name):
        raise InputError(src, f"{name} is not a number (RFC 8259); write finite values")

    try:
        doc = json.loads(text, parse_constant=constant)
    except json.JSONDecodeError as exc:
        raise InputError(src, f"not valid JSON ({exc})") from None
    return definition_from_document(doc, src)


#: Columns of the per-marker residual table (TSV), in order.
MARKER_TABLE_COLUMNS = (
    "scan", "marker", "id",
    "definition_x_mm", "definition_y_mm", "definition_z_mm",
    "detected_r_mm", "detected_a_mm", "detected_s_mm",
    "predicted_r_mm", "predicted_a_mm", "predicted_s_mm",
    "residual_r_mm", "residual_a_mm", "residual_s_mm",
    "residual_mm", "rigid_residual_mm", "weight", "outlier",
)


def marker_table_text(rows: list[dict], ids: list[str] | None = None) -> str:
    """The residual table as TSV text (one line per matched marker and scan)."""
    lines = ["\t".join(MARKER_TABLE_COLUMNS)]
    for row in rows:
        ident = ids[row["marker"]] if ids is not None else str(row["marker"])
        values = [row["scan"], str(row["marker"]), ident]
        for key in ("definition_mm", "detected_ras_mm", "predicted_ras_mm", "residual_ras_mm"):
            values += [f"{v:.4f}" for v in row[key]]
        values += [f"{row['residual_mm']:.4f}", f"{row['rigid_residual_mm']:.4f}", f"{row['weight']:.4f}",
                   "yes" if row["outlier"] else "no"]
        lines.append("\t".join(values))
    return "\n".join(lines) + "\n"


def write_marker_table(outputs: OutputSet, path: str | Path, rows: list[dict],
                       ids: list[str] | None = None) -> Path:
    """Write the residual table under a name reserved in ``outputs``."""
    tmp = outputs.reserve(path)
    tmp.write_text(marker_table_text(rows, ids), encoding="utf-8")
    return Path(path)
