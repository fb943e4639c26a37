"""Numbers the quality reports show: masks, displacement statistics, slice profiles, flags.

Pure numpy: arrays and affines in, plain Python numbers out (JSON-ready).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from ..warp import index_to_ras, slice_normal_ras

__all__ = [
    "FAR_FROM_ISOCENTER_MM",
    "HEAD_MASK_FRACTION",
    "PERCENTILES",
    "decided_by_default",
    "displacement_stats",
    "distance_to_isocenter_mm",
    "fov_centre_ras_mm",
    "head_mask",
    "image_flags",
    "missing_table_position",
    "slice_profile",
]

#: Head mask: voxels brighter than this fraction of the image's 99th intensity
#: percentile (a robust maximum that ignores a few hot voxels). A plain
#: threshold, common practice for a quick foreground mask (no source); it keeps
#: the scalp and some background noise at low SNR, which is acceptable for a
#: "how far does the head move" figure.
HEAD_MASK_FRACTION = 0.15
#: Percentiles of the displacement magnitude shown in the tables.
PERCENTILES = (50.0, 95.0, 99.0)
#: An image whose field-of-view centre lies farther than this from the gradient
#: isocenter is flagged (the displacement grows quickly with the radius; common
#: practice keeps the head within a few centimetres of the isocenter, no source).
FAR_FROM_ISOCENTER_MM = 30.0


def head_mask(volume: np.ndarray, *, fraction: float = HEAD_MASK_FRACTION) -> np.ndarray:
    """Foreground mask by an intensity threshold.

    Parameters
    ----------
    volume : (X, Y, Z) ndarray
        Anatomy (the raw image; its first volume for a series).
    fraction : float
        Threshold as a fraction of the 99th intensity percentile.

    Returns
    -------
    (X, Y, Z) bool ndarray
        ``volume > fraction * percentile(volume, 99)``; empty for an image
        without any positive value.
    """
    data = np.asarray(volume, dtype=np.float32)
    finite = np.isfinite(data)
    if not finite.any():
        return np.zeros(data.shape, bool)
    robust_max = float(np.percentile(data[finite], 99))
    if robust_max <= 0:
        return np.zeros(data.shape, bool)
    return finite & (data > fraction * robust_max)


def _stats(values: np.ndarray) -> dict:
    if values.size == 0:
        return {"voxels": 0, "max_mm": None, **{f"p{p:g}_mm": None for p in PERCENTILES}}
    pct = np.percentile(values, PERCENTILES)
    return {
        "voxels": int(values.size),
        "max_mm": float(values.max()),
        **{f"p{p:g}_mm": float(v) for p, v in zip(PERCENTILES, pct, strict=True)},
    }


def displacement_stats(magnitude_mm: np.ndarray, mask: np.ndarray | None = None) -> dict:
    """Maximum and percentiles of the displacement magnitude, in the image and in a mask.

    Returns
    -------
    dict
        ``image`` and ``head`` (if ``mask`` is given), each with ``voxels``,
        ``max_mm`` and ``p50_mm``, ``p95_mm``, ``p99_mm`` (``numpy.percentile``,
        linear interpolation, the same definition as the warp summary).
    """
    mag = np.asarray(magnitude_mm)
    out = {"image": _stats(mag.ravel())}
    if mask is not None:
        out["head"] = _stats(mag[np.asarray(mask, bool)])
    return out


def distance_to_isocenter_mm(affine: np.ndarray, ijk: np.ndarray, isocenter_ras_mm) -> np.ndarray:
    """Distance (mm) of voxel indices (..., 3) from the isocenter (rotations keep distances)."""
    return np.linalg.norm(
        index_to_ras(np.asarray(affine, float), ijk) - np.asarray(isocenter_ras_mm), axis=-1
    )


def fov_centre_ras_mm(shape: Sequence[int], affine: np.ndarray) -> np.ndarray:
    """RAS position (mm) of the centre of a grid's field of view."""
    return index_to_ras(np.asarray(affine, float), (np.asarray(shape[:3], float) - 1) / 2)


def _plane_fit_residual(u: np.ndarray, v: np.ndarray, values: np.ndarray) -> float:
    """Peak-to-peak residual of ``values`` after a least-squares plane ``a + b u + c v``."""
    if values.size < 3:
        return 0.0
    design = np.stack([np.ones_like(u), u, v], -1)
    coef, *_ = np.linalg.lstsq(design, values, rcond=None)
    resid = values - design @ coef
    return float(resid.max() - resid.min())


def slice_profile(
    disp_ras_mm: np.ndarray, affine: np.ndarray, slice_axis: int, valid: np.ndarray | None = None
) -> dict:
    """Through-plane displacement of each slice of a 2D acquisition.

    Parameters
    ----------
    disp_ras_mm : (X, Y, Z, 3) ndarray
        Displacement (encoded minus true position), RAS mm.
    affine : (4, 4) ndarray
        Grid affine.
    slice_axis : int
        Voxel axis normal to the slices.
    valid : (X, Y, Z) bool ndarray, optional
        Voxels to use (e.g. inside the valid radius); default all.

    Returns
    -------
    dict
        ``position_mm`` (slice centre along the normal, from the grid origin),
        ``thickness_mm``, and per slice: ``shift_mean_mm``, ``shift_min_mm``,
        ``shift_max_mm`` (through-plane displacement across the slice),
        ``bow_mm`` (peak-to-peak departure of the displaced slice from its
        best-fit plane: the curvature across the field of view),
        ``thickness_change_mean_mm``, ``thickness_change_min_mm``,
        ``thickness_change_max_mm``. Slices without valid voxels hold None.

    Notes
    -----
    With :math:`\\hat n` the slice normal and :math:`d_n = d \\cdot \\hat n`, a
    slice of nominal thickness :math:`t` is moved by :math:`d_n` and its local
    thickness changes by :math:`t\\, \\partial d_n / \\partial n`. The
    derivative is a central difference between neighbouring slices (one-sided
    at the ends; ``numpy.gradient``), taken along the slice axis: exact for an
    orthogonal grid and a field linear over two slices.
    """
    affine = np.asarray(affine, float)
    normal = slice_normal_ras(affine, slice_axis)
    d_n = np.moveaxis(np.asarray(disp_ras_mm, float) @ normal, slice_axis, -1)
    thickness = float(abs(affine[:3, slice_axis] @ normal))
    n_slices = d_n.shape[-1]
    if n_slices > 1:
        change = thickness * np.gradient(d_n, thickness, axis=-1)
    else:
        change = np.full(d_n.shape, np.nan)
    ok = np.ones(d_n.shape, bool) if valid is None else np.moveaxis(np.asarray(valid, bool), slice_axis, -1)
    inplane = [a for a in range(3) if a != slice_axis]
    cols = affine[:3, inplane]
    ii, jj = np.meshgrid(np.arange(d_n.shape[0]), np.arange(d_n.shape[1]), indexing="ij")
    # In-plane coordinates (mm) for the plane fit.
    u = ii * np.linalg.norm(cols[:, 0])
    v = jj * np.linalg.norm(cols[:, 1])
    origin_n = float(affine[:3, 3] @ normal)
    rows = {
        k: []
        for k in (
            "shift_mean_mm",
            "shift_min_mm",
            "shift_max_mm",
            "bow_mm",
            "thickness_change_mean_mm",
            "thickness_change_min_mm",
            "thickness_change_max_mm",
        )
    }
    for k in range(n_slices):
        sel = ok[..., k]
        vals, dt = d_n[..., k][sel], change[..., k][sel]
        if vals.size == 0:
            for key in rows:
                rows[key].append(None)
            continue
        rows["shift_mean_mm"].append(float(vals.mean()))
        rows["shift_min_mm"].append(float(vals.min()))
        rows["shift_max_mm"].append(float(vals.max()))
        rows["bow_mm"].append(_plane_fit_residual(u[sel], v[sel], vals))
        finite = np.isfinite(dt)
        for stat, fn in (("mean", np.mean), ("min", np.min), ("max", np.max)):
            rows[f"thickness_change_{stat}_mm"].append(float(fn(dt[finite])) if finite.any() else None)
    positions = [origin_n + k * float(affine[:3, slice_axis] @ normal) for k in range(n_slices)]
    return {
        "slice_axis": int(slice_axis),
        "normal_ras": [float(x) for x in normal],
        "thickness_mm": thickness,
        "position_mm": positions,
        **rows,
    }


def decided_by_default(decision: Mapping) -> bool:
    """Whether a decision rests on a default rather than on the image's metadata.

    True when the scanner's correction state was unknown and the site policy
    chose (the reason says ``site policy:``), or when the patient position was
    missing and the policy's default assumed (a warning says ``missing:
    assuming``). A missing table position is a flag of its own
    (:func:`missing_table_position`).
    """
    reason = str(decision.get("reason", ""))
    assumed = [w for w in _warnings(decision) if "missing: assuming" in w]
    return "site policy:" in reason or any(_TABLE_ASSUMED not in w for w in assumed)


#: The decision's warning when the table position is missing (bids.decisions).
_TABLE_ASSUMED = "missing: assuming the world origin"


def _warnings(decision: Mapping) -> list[str]:
    warnings = decision.get("warnings") or []
    return [warnings] if isinstance(warnings, str) else [str(w) for w in warnings]


def missing_table_position(decision: Mapping, summary: Mapping | None = None) -> bool:
    """Whether the isocenter offset was assumed (no TablePosition, no override)."""
    if any(_TABLE_ASSUMED in w for w in _warnings(decision)):
        return True
    return summary is not None and summary.get("isocenter_offset_from") == "default (zeros)"


def image_flags(
    *,
    summary: Mapping | None,
    decision: Mapping,
    fov_centre_ras_mm=None,
    far_mm: float = FAR_FROM_ISOCENTER_MM,
) -> list[str]:
    """Outlier flags of one image for the dataset index.

    ``far off isocenter`` (field-of-view centre farther than ``far_mm`` from
    the isocenter used), ``no table position`` (the isocenter offset is the
    default), ``decided by default`` (see :func:`decided_by_default`).
    """
    flags = []
    if summary is not None and fov_centre_ras_mm is not None:
        dist = float(np.linalg.norm(np.asarray(fov_centre_ras_mm) - np.asarray(summary["isocenter_ras_mm"])))
        if dist > far_mm:
            flags.append(f"far off isocenter ({dist:.0f} mm)")
    if missing_table_position(decision, summary):
        flags.append("no table position")
    if decided_by_default(decision):
        flags.append("decided by default")
    return flags
