"""Field samples of one gradient coil: a plain table or a NIfTI field map.

Table (``.tsv``, ``.txt``; tab- or comma-separated, the separator taken from
the header row)::

    # nl_unwarp field samples (any comment text)
    # gradient_mT_per_m: 40.0
    # axis: x
    x_mm	y_mm	z_mm	bz_mT
    0.0	0.0	150.0	0.0012
    ...

* Columns ``x_mm, y_mm, z_mm``: sample position in the **device frame**
  (gradient-coil axes, origin at the isocenter), mm; ``bz_mT``: the z field
  made by this coil alone at its nominal gradient, mT (measure it as half the
  difference of maps at +G and -G, which removes the main field's offset).
* Comment lines start with ``#``. Two may carry values: ``gradient_mT_per_m``,
  the coil's nominal gradient at the isocenter (mT/m; or give it on the
  command line), and ``axis`` (x, y or z), checked against the axis the file is
  given for.

NIfTI field map (``.nii``, ``.nii.gz``): a 3-D map of ``bz_mT``; voxels that are
NaN are not samples. Frame of the affine: **taken as device-frame mm** as it
stands, unless a patient position, table position or isocenter offset is
given, in which case the affine is world RAS mm (NIfTI) and is mapped to the
device frame by :class:`nl_unwarp.frames.DeviceFrame`.

Every problem raises :class:`~nl_unwarp.errors.InputError` naming the file and
the line, column or header field.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..frames import PATIENT_POSITIONS, DeviceFrame, offset_from_table_position
from .text import read_input_text

__all__ = ["COLUMNS", "FieldSamples", "load_field_samples", "write_field_samples"]

#: Columns of a sample table, in order.
COLUMNS = ("x_mm", "y_mm", "z_mm", "bz_mT")
_META = re.compile(r"^#\s*([A-Za-z_]+)\s*[:=]\s*(.*?)\s*$")
_NIFTI_SUFFIXES = (".nii", ".nii.gz")


@dataclass
class FieldSamples:
    """Samples of the z field of one gradient coil.

    Attributes
    ----------
    points_device_mm : (N, 3) ndarray
        Sample positions, device frame, mm.
    bz_mT : (N,) ndarray
        Field of the coil at its nominal gradient, mT.
    gradient_mT_per_m : float or None
        Nominal gradient stated in the file (None: not stated).
    source : str
        File the samples came from.
    frame_note : str
        How the positions were put into the device frame (for reports).
    """

    points_device_mm: np.ndarray
    bz_mT: np.ndarray
    gradient_mT_per_m: float | None
    source: str
    frame_note: str


def _is_nifti(path: Path) -> bool:
    return path.name.lower().endswith(_NIFTI_SUFFIXES)


def _positive_gradient(text: str, src: str, where: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise InputError(src, f"{where}: gradient_mT_per_m {text!r} is not a number") from None
    if not (math.isfinite(value) and value > 0):
        raise InputError(src, f"{where}: gradient_mT_per_m must be a positive number of mT/m, got {text}")
    return value


def _read_table(path: Path, axis: str | None) -> FieldSamples:
    src = str(path)
    text = read_input_text(path, "field sample file")
    gradient, header, rows = None, None, []
    for line_no, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line:
            continue
        if line.startswith("#"):
            meta = _META.match(line)
            key = meta.group(1).lower() if meta else ""
            if key == "gradient_mt_per_m":
                gradient = _positive_gradient(meta.group(2), src, f"line {line_no}")
            elif key == "axis":
                stated = meta.group(2).lower()
                if stated not in ("x", "y", "z"):
                    raise InputError(src, f"line {line_no}: axis must be x, y or z, got {meta.group(2)!r}")
                if axis is not None and stated != axis:
                    raise InputError(src, f"line {line_no}: the file says axis {stated}, but it was given "
                                          f"as the {axis} samples")
            continue
        sep = "\t" if "\t" in line else ","
        cells = [c.strip() for c in line.split(sep)]
        if header is None:
            header = [c.lower() for c in cells]
            if header != [c.lower() for c in COLUMNS]:
                raise InputError(src, f"line {line_no}: header must be {', '.join(COLUMNS)} "
                                      f"(tab- or comma-separated), got {', '.join(cells)}")
            continue
        if len(cells) != len(COLUMNS):
            raise InputError(src, f"line {line_no}: {len(cells)} values, expected {len(COLUMNS)} "
                                  f"({', '.join(COLUMNS)})")
        values = []
        for name, cell in zip(COLUMNS, cells, strict=True):
            try:
                value = float(cell)
            except ValueError:
                raise InputError(src, f"line {line_no}, column {name}: {cell!r} is not a number") from None
            if not math.isfinite(value):
                raise InputError(src, f"line {line_no}, column {name}: {cell} is not finite")
            values.append(value)
        rows.append(values)
    if header is None:
        raise InputError(src, f"no header row: the first line that is not a comment must be "
                              f"{', '.join(COLUMNS)}")
    if not rows:
        raise InputError(src, "no samples after the header row")
    data = np.asarray(rows, dtype=float)
    return FieldSamples(data[:, :3], data[:, 3], gradient, src,
                        "table columns x_mm, y_mm, z_mm (device frame)")


def _device_frame(position, table_position_mm, isocenter_offset_mm) -> DeviceFrame | None:
    if position is None and table_position_mm is None and isocenter_offset_mm is None:
        return None
    if position is not None and position.upper() not in PATIENT_POSITIONS:
        raise InputError("--position", f"unknown patient position {position!r}; expected one of "
                                       f"{', '.join(PATIENT_POSITIONS)}")
    if isocenter_offset_mm is not None:
        offset = np.asarray(isocenter_offset_mm, dtype=float)
    elif table_position_mm is not None:
        offset = offset_from_table_position(table_position_mm)
    else:
        offset = np.zeros(3)
    return DeviceFrame(position or "HFS", offset)


def _read_nifti(path: Path, frame: DeviceFrame | None) -> FieldSamples:
    from .nifti import load_image

    src = str(path)
    image = load_image(path)
    data = np.asarray(image.data, dtype=float)
    if data.ndim == 4:
        if data.shape[3] != 1:
            raise InputError(src, f"header field dim: {data.shape[3]} volumes; a field map is one "
                                  "3-D volume of bz_mT")
        data = data[..., 0]
    units = image.header.get_xyzt_units()[0]
    if units not in ("mm", "unknown"):
        raise InputError(src, f"header field xyzt_units: spatial unit is {units}; the affine must be in mm")
    keep = np.isfinite(data)
    if not np.any(keep):
        raise InputError(src, "every voxel is NaN: no field samples")
    ijk = np.argwhere(keep).astype(float)
    points = ijk @ image.affine[:3, :3].T + image.affine[:3, 3]
    if frame is None:
        note = "NIfTI affine taken as device-frame mm"
    else:
        points = frame.to_device(points)
        note = (f"NIfTI affine taken as world RAS mm, mapped to the device frame for patient position "
                f"{frame.position}, isocenter offset "
                f"({', '.join(f'{v:g}' for v in frame.isocenter_offset_mm)}) mm")
    return FieldSamples(points, data[keep], None, src, note)


def load_field_samples(
    path: str | Path,
    *,
    axis: str | None = None,
    gradient_mT_per_m: float | None = None,
    position: str | None = None,
    table_position_mm=None,
    isocenter_offset_mm=None,
) -> FieldSamples:
    """Read the field samples of one gradient coil (see the module notes for the formats).

    Parameters
    ----------
    path : str or Path
        A sample table or a NIfTI field map.
    axis : {"x", "y", "z"}, optional
        The coil the samples are of (checked against a table's ``# axis:`` line).
    gradient_mT_per_m : float, optional
        Nominal gradient from the command line. If the file states one too,
        they must agree.
    position, table_position_mm, isocenter_offset_mm : optional
        For a NIfTI map: read its affine as world RAS and map it to the device
        frame (:class:`nl_unwarp.frames.DeviceFrame`). Without them the
        affine is device-frame mm. Not allowed with a table (whose columns are
        device-frame already).

    Returns
    -------
    FieldSamples
        With ``gradient_mT_per_m`` resolved (file or argument).

    Raises
    ------
    InputError
        Naming the file and the line, column or header field.
    """
    path = Path(path)
    src = str(path)
    frame = _device_frame(position, table_position_mm, isocenter_offset_mm)
    if _is_nifti(path):
        samples = _read_nifti(path, frame)
    else:
        if frame is not None:
            raise InputError(src, "a sample table is in the device frame already: patient position, "
                                  "table position and isocenter offset apply to NIfTI field maps only")
        samples = _read_table(path, axis)
    stated = samples.gradient_mT_per_m
    if gradient_mT_per_m is not None:
        given = _positive_gradient(str(gradient_mT_per_m), src, "nominal gradient")
        if stated is not None and not math.isclose(stated, given, rel_tol=1e-9):
            raise InputError(src, f"gradient_mT_per_m: the file states {stated:g} mT/m, the command "
                                  f"line {given:g} mT/m; give one")
        stated = given
    if stated is None:
        raise InputError(src, "gradient_mT_per_m: nominal gradient not given; add a line "
                              "'# gradient_mT_per_m: G' or give it on the command line")
    samples.gradient_mT_per_m = stated
    return samples


def write_field_samples(path: Path, points_device_mm: np.ndarray, bz_mT: np.ndarray, *,
                        gradient_mT_per_m: float, axis: str | None = None, comment: str = "") -> Path:
    """Write a sample table (for demos and tests; the caller makes the write atomic).

    Floats are written with Python's shortest round-trip repr.
    """
    lines = [f"# {comment or 'nl_unwarp field samples'}", f"# gradient_mT_per_m: {gradient_mT_per_m!r}"]
    if axis is not None:
        lines.append(f"# axis: {axis}")
    lines.append("\t".join(COLUMNS))
    pts = np.asarray(points_device_mm, dtype=float)
    values = np.asarray(bz_mT, dtype=float)
    lines += [f"{p[0]!r}\t{p[1]!r}\t{p[2]!r}\t{b!r}"
              for p, b in zip(pts.tolist(), values.tolist(), strict=True)]
    Path(path).write_text("\n".join(lines) + "\n", encoding="utf-8")
    return Path(path)
