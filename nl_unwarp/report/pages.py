"""The three report pages, rendered from arrays and JSON-ready records to HTML text.

Nothing here reads or writes files (see :mod:`nl_unwarp.report.files`).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from html import escape

import numpy as np

from . import figures as figs
from .html import Cell, figure, key_value_table, number, page, table, toggle
from .stats import decided_by_default, displacement_stats, head_mask, slice_profile

__all__ = [
    "DatasetEntry",
    "ImageInputs",
    "coil_page_name",
    "render_coil_page",
    "render_dataset_page",
    "render_image_page",
]

#: Sidecar keys a decision reads, shown beside it (BIDS names; a site may map others).
DECISION_METADATA_KEYS = (
    "Manufacturer",
    "ManufacturersModelName",
    "DeviceSerialNumber",
    "StationName",
    "SoftwareVersions",
    "MRAcquisitionType",
    "ImageType",
    "NonlinearGradientCorrection",
    "NonLinearGradientCorrection",
    "PatientPosition",
    "TablePosition",
)
#: Summary keys that may hold the diffusion b-value deviation per shell: a block
#: with a ``shells`` list (as :func:`nl_unwarp.diffusion.weighting_summary`
#: gives), or the list itself.
SHELL_KEYS = ("diffusion", "bvalue_deviation", "b_value_deviation", "weighting", "shells")


def coil_page_name(sha256: str | None) -> str | None:
    """File name of a coil model's page (from its SHA-256, never from its path)."""
    return f"coil-{sha256[:12]}.html" if sha256 else None


@dataclass
class ImageInputs:
    """What a per-image page shows.

    Attributes
    ----------
    title : str
        Image name (e.g. its path relative to the dataset).
    raw : (X, Y, Z[, T]) ndarray
        The image as the scanner reconstructed it (first volume of a series shown).
    affine : (4, 4) ndarray
    summary : dict
        The warp summary (:func:`nl_unwarp.api.warp_summary`).
    disp_ras_mm : (X, Y, Z, 3) ndarray or callable
        The displacement on the raw grid, RAS mm; or a function from voxel
        indices (..., 3) to it, evaluated only where a figure needs it (the
        grid overlay's planes; the whole grid for a 2D acquisition's slice
        profile). A function needs ``magnitude_mm``.
    jacobian : (X, Y, Z) ndarray or callable
        The Jacobian determinant map; or a function of voxel indices
        (evaluated on the shown planes; needs ``jacobian_range``).
    corrected : ndarray, optional
        The corrected image (absent when the image was not resampled).
    decision : dict, optional
        The decision record (:meth:`nl_unwarp.bids.decisions.Decision.as_record`).
    metadata : dict, optional
        The sidecar metadata the decision read.
    magnitude_mm : (X, Y, Z) ndarray, optional
        The displacement magnitude map (default: from ``disp_ras_mm``).
    jacobian_range : (float, float), optional
        Minimum and maximum of the Jacobian determinant in the image
        (default: of ``jacobian``).
    """

    title: str
    raw: np.ndarray
    affine: np.ndarray
    summary: dict
    disp_ras_mm: np.ndarray | Callable[[np.ndarray], np.ndarray]
    jacobian: np.ndarray | Callable[[np.ndarray], np.ndarray]
    corrected: np.ndarray | None = None
    decision: dict | None = None
    metadata: dict | None = None
    coil_page_href: str | None = None
    extra: dict = field(default_factory=dict)
    magnitude_mm: np.ndarray | None = None
    jacobian_range: tuple[float, float] | None = None

    def displacement_grid(self) -> np.ndarray:
        """The (X, Y, Z, 3) displacement, evaluated on the whole grid if given as a function."""
        if not callable(self.disp_ras_mm):
            return self.disp_ras_mm
        shape = _first_volume(self.raw).shape
        ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1).astype(float)
        return np.asarray(self.disp_ras_mm(ijk))


def _first_volume(data: np.ndarray) -> np.ndarray:
    data = np.asarray(data)
    return data.reshape(data.shape[:3] + (-1,))[..., 0] if data.ndim > 3 else data


def _vec(values, digits=1) -> str:
    # + 0.0 turns a negative zero into zero: "-0.0" reads as a sign error.
    return "(" + ", ".join(f"{round(float(v), digits) + 0.0:.{digits}f}" for v in values) + ")"


def _identity_table(s: Mapping, coil_href: str | None) -> str:
    coil = s["coil_model"]
    link = f' &middot; <a href="{escape(coil_href)}">coil model page</a>' if coil_href else ""
    items = {
        "coil model": Cell(
            escape(str(coil["label"])) + link, raw_html=True, key="coil_label", value=coil["label"]
        ),
        "coil model SHA-256": Cell(str(coil["sha256"]), key="coil_sha256", value=coil["sha256"]),
        "harmonic degree": Cell(str(coil["degree"]), key="coil_degree", value=coil["degree"]),
        "valid radius": number(coil["valid_radius_mm"], 1, key="valid_radius_mm", unit="mm"),
        "patient position": Cell(s["patient_position"], key="patient_position", value=s["patient_position"]),
        "isocenter used (world RAS)": Cell(
            _vec(s["isocenter_ras_mm"]) + " mm",
            key="isocenter_ras_mm",
            value=[float(v) for v in s["isocenter_ras_mm"]],
        ),
        "isocenter offset (device)": Cell(
            _vec(s["isocenter_offset_mm"]) + " mm",
            key="isocenter_offset_mm",
            value=[float(v) for v in s["isocenter_offset_mm"]],
        ),
        "isocenter from": Cell(
            s["isocenter_offset_from"], key="isocenter_offset_from", value=s["isocenter_offset_from"]
        ),
        "correction mode": Cell(s["mode"], key="mode", value=s["mode"]),
        "slice axis": Cell(
            "n/a" if s.get("slice_axis") is None else "ijk"[s["slice_axis"]], key="slice_axis"
        ),
        "software": Cell(f"{s['software']['name']} {s['software']['version']}"),
    }
    return key_value_table(items, table_id="identity")


def _decision_section(decision: Mapping | None, metadata: Mapping | None) -> str:
    if decision is None:
        return "<p>No decision record: the correction was asked for directly, in the mode shown above.</p>"
    warnings = decision.get("warnings") or []
    items = {
        "action": Cell(str(decision["action"]), key="action", value=decision["action"]),
        "why": Cell(str(decision["reason"]), key="reason", value=decision["reason"]),
        "scanner rule": Cell(str(decision.get("rule", "")), key="rule", value=decision.get("rule")),
        "site": Cell(str(decision.get("site", "") or "-"), key="site", value=decision.get("site")),
        "coil model (site name)": Cell(str(decision.get("coil_model", "")), key="coil_model"),
        "made by default": Cell("yes" if decided_by_default(decision) else "no", key="by_default"),
        "warnings": Cell("; ".join(warnings) or "none", key="warnings", value=list(warnings)),
    }
    out = key_value_table(items, table_id="decision")
    if metadata:
        rows = [[k, Cell(_json_text(metadata[k]), key=k)] for k in DECISION_METADATA_KEYS if k in metadata]
        rows = rows or [["(none of the keys a decision reads)", ""]]
        out += "<p class='sub'>Sidecar metadata the decision read:</p>" + table(
            ["key", "value"], rows, table_id="metadata"
        )
    return out


def _json_text(value) -> str:
    import json

    return value if isinstance(value, str) else json.dumps(value)


def _displacement_table(stats: Mapping, s: Mapping) -> str:
    head = ["region", "voxels", "max (mm)", "median (mm)", "95th pct (mm)", "99th pct (mm)"]
    rows = []
    for region, label in (("image", "whole image"), ("head", "head mask")):
        st = stats.get(region)
        if st is None:
            continue
        rows.append(
            [
                label,
                Cell(str(st["voxels"]), value=st["voxels"], key=f"{region}.voxels", num=True),
                number(st["max_mm"], key=f"{region}.max_mm"),
                number(st["p50_mm"], key=f"{region}.p50_mm"),
                number(st["p95_mm"], key=f"{region}.p95_mm"),
                number(st["p99_mm"], key=f"{region}.p99_mm"),
            ]
        )
    out = table(head, rows, table_id="displacement")
    extra = {
        "max inside the valid radius": number(
            s.get("displacement_max_inside_valid_mm"), key="displacement_max_inside_valid_mm", unit="mm"
        ),
        "voxels beyond the valid radius": number(
            100 * s["outside_valid_fraction"], 2, key="outside_valid_percent", unit="%"
        ),
        "Jacobian determinant, min": number(s["jacobian_min"], 4, key="jacobian_min"),
        "Jacobian determinant, max": number(s["jacobian_max"], 4, key="jacobian_max"),
        "warp lattice / interpolation error": Cell(
            f"{s['lattice_mm']:g} mm / {s['interpolation_error_mm']:.1e} mm"
        ),
    }
    return out + key_value_table(extra, table_id="warp")


def _is_2d(inputs: ImageInputs) -> bool:
    meta = inputs.metadata or {}
    return inputs.summary.get("mode") in ("inplane", "throughplane") or meta.get("MRAcquisitionType") == "2D"


def _slice_section(inputs: ImageInputs, valid: np.ndarray) -> str:
    from ..warp import default_slice_axis

    axis = inputs.summary.get("slice_axis")
    axis = default_slice_axis(inputs.affine) if axis is None else int(axis)
    prof = slice_profile(inputs.displacement_grid(), inputs.affine, axis, valid)
    inputs.extra["slice_profile"] = prof
    rows = []
    for k, pos in enumerate(prof["position_mm"]):
        rows.append(
            [
                Cell(str(k), num=True),
                number(pos, 1),
                number(prof["shift_mean_mm"][k], key=f"shift_mean_mm.{k}"),
                number(prof["shift_min_mm"][k]),
                number(prof["shift_max_mm"][k]),
                number(prof["bow_mm"][k], key=f"bow_mm.{k}"),
                number(prof["thickness_change_mean_mm"][k], key=f"thickness_change_mean_mm.{k}"),
            ]
        )
    caption = (
        f"Slices {prof['thickness_mm']:.1f} mm apart along voxel axis {'ijk'[axis]}; through-plane "
        "part of the displacement of the scanner's encoding (before correction), voxels inside the "
        "valid radius. Bow: peak-to-peak departure of the displaced slice from its best-fit plane."
    )
    return (
        figure(
            figs.slice_profile_figure(prof),
            caption,
            fig_id="fig-slices",
            alt="per-slice through-plane displacement",
        )
        + "<details><summary>per-slice table</summary>"
        + table(
            [
                "slice",
                "position (mm)",
                "mean shift (mm)",
                "min shift (mm)",
                "max shift (mm)",
                "bow (mm)",
                "mean thickness change (mm)",
            ],
            rows,
            table_id="slices",
        )
        + "</details>"
    )


def _find_shells(summary: Mapping) -> tuple[list, Mapping]:
    """Per-shell records and their container, wherever the summary keeps them."""
    for key in SHELL_KEYS:
        block = summary.get(key)
        if isinstance(block, Mapping) and isinstance(block.get("shells"), list):
            return block["shells"], block
        if isinstance(block, list) and block:
            return block, {}
    return [], {}


def _shell_section(summary: Mapping) -> str:
    """b-value deviation per shell (``b_eff / b - 1`` in %), when the summary has it."""
    shells, block = _find_shells(summary)
    if not shells:
        return ""
    rows = []
    for i, r in enumerate(shells):

        def pct(name, i=i, r=r):
            value = r.get(name)
            cell = number(None if value is None else 100 * value, 3, key=f"{name}_percent.{i}")
            cell.value = value
            return cell

        vols = r.get("volumes")
        rows.append(
            [
                number(r.get("bval", r.get("bvalue")), 0, key=f"bval.{i}"),
                Cell(str(len(vols)) if isinstance(vols, list) else "-", num=True),
                pct("median_deviation"),
                pct("min_deviation"),
                pct("max_deviation"),
                Cell(_vec(r["min_at_ras_mm"]) if r.get("min_at_ras_mm") else "-"),
                Cell(_vec(r["max_at_ras_mm"]) if r.get("max_at_ras_mm") else "-"),
            ]
        )
    note = f" over {block['mask_voxels']} mask voxels" if block.get("mask_voxels") else ""
    return (
        "<h2>Diffusion: b-value deviation per shell</h2>"
        f"<p class='sub'>Effective over nominal b-value minus one, in %{escape(note)}: median over the "
        "mask of each voxel's mean over the shell's directions, and the extremes over voxels and "
        "directions (where, in world RAS mm).</p>"
        + table(
            [
                "b (s/mm²)",
                "volumes",
                "median (%)",
                "min (%)",
                "max (%)",
                "min at (RAS mm)",
                "max at (RAS mm)",
            ],
            rows,
            table_id="shells",
        )
    )


def render_image_page(inputs: ImageInputs) -> str:
    """The per-image quality page (HTML text)."""
    s = inputs.summary
    anatomy = _first_volume(inputs.raw).astype(np.float32, copy=False)
    corrected = None if inputs.corrected is None else _first_volume(inputs.corrected)
    if inputs.magnitude_mm is not None:
        mag = np.asarray(inputs.magnitude_mm, dtype=np.float32)
    else:
        disp = inputs.displacement_grid()
        mag = np.sqrt(np.einsum("...i,...i->...", disp, disp))
    mask = head_mask(anatomy)
    stats = displacement_stats(mag, mask)
    inputs.extra["displacement"] = stats
    radius = s["coil_model"]["valid_radius_mm"]
    views = figs.volume_views(anatomy, inputs.affine, s["isocenter_ras_mm"], radius)
    mag_png, reached = figs.magnitude_figure(views, mag, stats["image"]["max_mm"] or 0.0)
    boundary = (
        "The dashed cyan line is the coil model's valid radius "
        f"({radius:g} mm); hatched: beyond it, where the correction is extrapolated."
        if reached
        else f"The shown planes stay inside the valid radius ({radius:g} mm)."
    )
    body = [
        f"<p class='sub'>Image <code>{escape(inputs.title)}</code></p>",
        "<h2>Coil model, placement and decision</h2>",
        _identity_table(s, inputs.coil_page_href),
        "<h2>What was decided, and why</h2>",
        _decision_section(inputs.decision, inputs.metadata),
        "<h2>Displacement</h2>",
        f"<p class='sub'>Head mask: voxels brighter than a fraction of the 99th intensity percentile "
        f"of the raw image ({int(mask.sum())} voxels).</p>",
        _displacement_table(stats, s),
        figure(
            mag_png,
            "Displacement magnitude over the raw anatomy, with contours in mm. " + boundary,
            fig_id="fig-magnitude",
            alt="displacement magnitude on three planes",
        ),
    ]
    before, after = figs.before_after_figures(views, anatomy, corrected, inputs.disp_ras_mm, inputs.affine)
    body.append("<h2>Before and after</h2>")
    cap = (
        "Green: a grid at true positions. In the raw image it appears where the scanner encoded it "
        "(bent by the gradient nonlinearity, in-plane part shown); after correction it lies straight "
        "on the anatomy. Same grey-level window in both."
    )
    if after is not None:
        body.append(
            toggle(
                "before-after",
                "before (raw)",
                figure(before, cap, fig_id="fig-before", alt="raw"),
                "after (corrected)",
                figure(after, cap, fig_id="fig-after", alt="corrected"),
            )
        )
    else:
        body.append(
            "<p>The image was not resampled (decision: "
            f"{escape(str((inputs.decision or {}).get('action', 'n/a')))}); the raw image is shown "
            "with the grid the warp would straighten.</p>"
        )
        body.append(figure(before, cap, fig_id="fig-before", alt="raw"))
    if inputs.jacobian_range is not None:
        jrange = tuple(float(v) for v in inputs.jacobian_range)
    else:
        jrange = (float(inputs.jacobian.min()), float(inputs.jacobian.max()))
    body += [
        "<h2>Jacobian determinant</h2>",
        figure(
            figs.jacobian_figure(views, inputs.jacobian, jrange, anatomy.shape),
            f"Volume change of the encoding: range {jrange[0]:.4f} .. {jrange[1]:.4f} in the image "
            "(> 1: the scanner stretched the image there, intensities diluted). " + boundary,
            fig_id="fig-jacobian",
            alt="Jacobian determinant on three planes",
        ),
    ]
    if _is_2d(inputs):
        from ..frames import DeviceFrame
        from ..warp import outside_valid_radius

        body.append("<h2>2D acquisition: through-plane displacement per slice</h2>")
        frame = DeviceFrame(s["patient_position"], s["isocenter_offset_mm"])
        valid = ~outside_valid_radius(inputs.affine, anatomy.shape, frame, radius)
        body.append(_slice_section(inputs, valid))
    body.append(_shell_section(s))
    return page(f"Gradient-nonlinearity report: {inputs.title}", "\n".join(body))


def render_coil_page(
    coil, sha256: str | None, *, radii_mm: Sequence[float] = (50.0, 100.0, 150.0, 200.0)
) -> str:
    """The coil model page: displacement maps on the principal planes and the radius table."""
    from ..api import displacement_table

    rows = []
    for r in displacement_table(coil, radii_mm):
        key = f"{r['radius_mm']:g}"
        rows.append(
            [
                number(r["radius_mm"], 0, key=f"radius_mm.{key}"),
                number(r["max_mm"], key=f"max_mm.{key}"),
                number(r["rms_mm"], key=f"rms_mm.{key}"),
                Cell(
                    "yes" if r["inside_valid_radius"] else "no (extrapolated)",
                    key=f"inside_valid_radius.{key}",
                    value=r["inside_valid_radius"],
                ),
            ]
        )
    source = coil.source or {}
    items = {
        "label": Cell(coil.label, key="label", value=coil.label),
        "SHA-256": Cell(str(sha256), key="sha256", value=sha256),
        "harmonic degree": Cell(str(coil.degree), key="degree", value=coil.degree),
        "valid radius": number(coil.valid_radius_mm, 1, key="valid_radius_mm", unit="mm"),
        "source": Cell(
            str(source.get("kind", "unknown"))
            + (f": {source['description']}" if source.get("description") else "")
        ),
    }
    body = [
        "<h2>Identity</h2>",
        key_value_table(items, table_id="coil"),
        "<h2>Displacement on spheres about the isocenter</h2>",
        table(["radius (mm)", "max |d| (mm)", "rms |d| (mm)", "inside valid radius"], rows, table_id="radii"),
        "<h2>Displacement on the principal planes</h2>",
        figure(
            figs.coil_planes_figure(coil),
            f"Displacement magnitude on the device frame's principal planes through the isocenter, "
            f"out to the valid radius ({coil.valid_radius_mm:g} mm, dashed; blank beyond).",
            fig_id="fig-coil",
            alt="coil model displacement maps",
        ),
    ]
    return page(f"Coil model: {coil.label}", "\n".join(body))


@dataclass
class DatasetEntry:
    """One image of the dataset index."""

    relpath: str
    decision: dict | None
    summary: dict | None = None
    flags: list[str] = field(default_factory=list)
    report_href: str | None = None
    coil_page_href: str | None = None
    problem: str | None = None

    @property
    def group(self) -> str:
        d = self.decision or {}
        return f"{d.get('rule') or '?'}" + (f" @ {d['site']}" if d.get("site") else "")


def render_dataset_page(entries: Sequence[DatasetEntry], *, title: str = "dataset") -> str:
    """The dataset index: decisions, maximum displacement by scanner, outlier flags."""
    rows = []
    for i, e in enumerate(entries):
        d = e.decision or {}
        shown = escape(e.relpath.rsplit("/", 1)[-1])
        name = (
            f'<a href="{escape(e.report_href)}" title="{escape(e.relpath)}">{shown}</a>'
            if e.report_href
            else f'<span title="{escape(e.relpath)}">{shown}</span>'
        )
        flags = (
            "".join(f'<span class="flag">{escape(f)}</span>' for f in e.flags) or '<span class="ok">-</span>'
        )
        dmax = None if e.summary is None else e.summary.get("displacement_max_mm")
        rows.append(
            [
                Cell(name, raw_html=True, key=f"image.{i}", value=e.relpath),
                Cell(str(d.get("site") or "-")),
                Cell(str(d.get("rule", "-"))),
                Cell(
                    str(d.get("action", "error" if e.problem else "-")),
                    key=f"action.{i}",
                    value=d.get("action"),
                ),
                number(dmax, key=f"displacement_max_mm.{i}"),
                Cell("-" if e.summary is None else str(e.summary.get("isocenter_offset_from"))),
                Cell(str(e.problem or d.get("reason", ""))),
                Cell(flags, raw_html=True, key=f"flags.{i}", value=list(e.flags)),
            ]
        )
    flagged = [e for e in entries if e.flags]
    points = [
        {
            "group": e.group,
            "value": None if e.summary is None else e.summary.get("displacement_max_mm"),
            "decision": (e.decision or {}).get("action", "?"),
            "flagged": bool(e.flags),
        }
        for e in entries
    ]
    coils = sorted(
        {
            (e.summary["coil_model"]["label"], e.coil_page_href)
            for e in entries
            if e.summary is not None and e.coil_page_href
        }
    )
    coil_list = "".join(f'<li><a href="{escape(h)}">{escape(lbl)}</a></li>' for lbl, h in coils)
    done = sum(e.summary is not None for e in entries)
    body = [
        f"<p class='sub'>{len(entries)} image(s), {done} with a warp; {len(flagged)} flagged.</p>",
        "<h2>Maximum displacement by scanner</h2>",
        figure(
            figs.dataset_figure(points),
            "Maximum displacement magnitude inside each image's field of "
            "view; circle: full correction, triangle: through-plane residual, square: skipped "
            "(warp emitted); red ring: flagged.",
            fig_id="fig-dataset",
            alt="displacement by scanner",
        ),
        "<h2>Decisions</h2>",
        table(
            [
                "image",
                "site",
                "scanner rule",
                "decision",
                "max |d| (mm)",
                "isocenter from",
                "reason",
                "flags",
            ],
            rows,
            table_id="decisions",
        ),
        "<h2>Flags</h2>",
        "<p class='sub'>far off isocenter: field-of-view centre farther than the threshold from the "
        "isocenter used; no table position: the isocenter offset was assumed; decided by default: the "
        "scanner's correction state or the patient position came from the site policy, not the "
        "sidecar.</p>",
        "<ul>"
        + (
            "".join(f"<li>{escape(e.relpath)}: {escape(', '.join(e.flags))}</li>" for e in flagged)
            or "<li>none</li>"
        )
        + "</ul>",
    ]
    if coil_list:
        body += ["<h2>Coil models</h2>", f"<ul>{coil_list}</ul>"]
    return page(f"Gradient-nonlinearity report: {title}", "\n".join(body))
