"""The phantom-fit report page: residual plots, coefficients with uncertainties, marker residuals.

Rendered from a :class:`~nl_unwarp.phantom_fit.PhantomFit` and the scans'
detection summaries; nothing here reads or writes files.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
from matplotlib.figure import Figure

from . import figures as figs
from .html import Cell, figure, key_value_table, number, page, table

__all__ = ["render_phantom_page", "residual_figure"]

#: A coefficient at least this many standard errors from zero is marked as resolved.
RESOLVED_SIGMAS = 3.0


def _vec(values, digits: int = 3) -> str:
    return ", ".join(f"{float(v):.{digits}f}" for v in values)


def residual_figure(markers: Sequence[Mapping], radius_device_mm: np.ndarray) -> bytes:
    """Residual norm against device radius (rigid only, and with the coil model), and a histogram."""
    fitted = np.array([m["residual_mm"] for m in markers])
    rigid = np.array([m["rigid_residual_mm"] for m in markers])
    comps = np.array([m["residual_ras_mm"] for m in markers]).reshape(-1, 3)
    fig = Figure(figsize=(10.5, 3.8), layout="constrained")
    ax1, ax2 = fig.subplots(1, 2)
    ax1.scatter(radius_device_mm, rigid, s=8, color="#8c959f", label="rigid pose only")
    ax1.scatter(radius_device_mm, fitted, s=8, color="#1f6feb", label="pose + coil model")
    ax1.set_xlabel("distance of the marker from the isocenter (mm)")
    ax1.set_ylabel("|detected - predicted| (mm)")
    ax1.set_title("marker residuals against radius", fontsize=10)
    ax1.grid(alpha=0.3)
    ax1.legend(fontsize=8)
    top = float(np.percentile(np.abs(comps), 99.5)) if comps.size else 1.0
    bins = np.linspace(-top, top, 41) if top > 0 else 20
    for c, (name, color) in enumerate(zip("RAS", ("#d1242f", "#1a7f37", "#1f6feb"), strict=True)):
        ax2.hist(comps[:, c], bins=bins, histtype="step", color=color, label=name, linewidth=1.3)
    ax2.set_xlabel("residual component (mm, world RAS)")
    ax2.set_ylabel("markers")
    ax2.set_title("residual components, pose + coil model", fontsize=10)
    ax2.legend(fontsize=8)
    return figs._png(fig)


def _scan_rows(scans: Sequence[Mapping]) -> list:
    rows = []
    for k, s in enumerate(scans):
        rows.append([
            Cell(s["label"], key=f"scan.{k}.label", value=s["label"]),
            number(s["detected"], 0, key=f"scan.{k}.detected"),
            number(s["matched"], 0, key=f"scan.{k}.matched"),
            number(s["missing"], 0, key=f"scan.{k}.missing"),
            number(s["spurious"], 0, key=f"scan.{k}.spurious"),
            number(s["rejected_blobs"], 0, key=f"scan.{k}.rejected_blobs"),
            Cell(_vec(s["isocenter_offset_mm"], 1)),
            number(s["residual_rms_mm"], 4, key=f"scan.{k}.residual_rms_mm"),
        ])
    return rows


def _coefficient_rows(coefficients: Sequence[Mapping]) -> list:
    rows = []
    for c in coefficients:
        key = f"{c['axis']}.{c['kind']}.{c['n']}.{c['m']}"
        ratio = abs(c["value"]) / c["sigma"] if c["sigma"] > 0 else float("inf")
        rows.append([c["axis"], c["kind"], str(c["n"]), str(c["m"]),
                     Cell(f"{c['value']:.3e}", value=c["value"], key=f"coef.{key}", num=True),
                     Cell(f"{c['sigma']:.1e}", value=c["sigma"], key=f"sigma.{key}", num=True),
                     Cell("yes" if ratio >= RESOLVED_SIGMAS else "no", value=bool(ratio >= RESOLVED_SIGMAS))])
    return rows


def _marker_rows(markers: Sequence[Mapping], ids: Sequence[str] | None) -> list:
    order = sorted(range(len(markers)), key=lambda k: -markers[k]["residual_mm"])
    rows = []
    for k in order:
        m = markers[k]
        ident = ids[m["marker"]] if ids is not None else str(m["marker"])
        rows.append([m["scan"], ident, Cell(_vec(m["definition_mm"], 1)), Cell(_vec(m["detected_ras_mm"])),
                     Cell(_vec(m["residual_ras_mm"])),
                     number(m["residual_mm"], 4, key=f"residual_mm.{m['scan']}.{ident}"),
                     number(m["rigid_residual_mm"], 3), number(m["weight"], 3),
                     Cell('<span class="flag">outlier</span>' if m["outlier"] else "", raw_html=True)])
    return rows


def render_phantom_page(fit, *, phantom_name: str, scans: Sequence[Mapping], coil_sha256: str | None,
                        radius_device_mm: np.ndarray, ids: Sequence[str] | None = None,
                        coil_href: str | None = None) -> str:
    """The phantom-fit page.

    Parameters
    ----------
    fit : PhantomFit
    phantom_name : str
        Name of the phantom definition.
    scans : sequence of mapping
        Per scan: ``label, detected, matched, missing, spurious, rejected_blobs,
        isocenter_offset_mm, residual_rms_mm``.
    coil_sha256 : str or None
        SHA-256 of the written coil model file.
    radius_device_mm : (M,) ndarray
        Distance of each matched marker (in ``fit.markers`` order) from the isocenter.
    ids : sequence of str, optional
        Marker ids of the definition.
    coil_href : str, optional
        Link to the coil model's page.
    """
    s = fit.settings
    pose_angles = fit.pose.rotation_angle_deg()
    items = {
        "phantom": Cell(phantom_name, key="phantom", value=phantom_name),
        "coil model": Cell(f'<a href="{coil_href}">{fit.coil.label}</a>' if coil_href else fit.coil.label,
                           raw_html=bool(coil_href)),
        "SHA-256": Cell(str(coil_sha256), key="sha256", value=coil_sha256),
        "degree": number(s["degree"], 0, key="degree"),
        "symmetry imposed": Cell(s["symmetry"], key="symmetry", value=s["symmetry"]),
        "loss": Cell(f"{s['loss']} (scale {s['loss_scale_mm']:g} mm)", key="loss", value=s["loss"]),
        "reference / valid radius": Cell(f"{s['reference_radius_mm']:.1f} / {s['valid_radius_mm']:.1f} mm",
                                         key="valid_radius_mm", value=s["valid_radius_mm"]),
        "markers fitted": number(len(fit.markers), 0, key="markers"),
        "residual rms": number(fit.residual_rms_mm, 4, key="residual_rms_mm", unit="mm"),
        "residual max": number(fit.residual_max_mm, 4, key="residual_max_mm", unit="mm"),
        "rigid-only residual rms": number(fit.rigid_residual_rms_mm, 4, key="rigid_residual_rms_mm",
                                          unit="mm"),
        "pose: translation (RAS)": Cell(f"{_vec(fit.pose.translation_ras_mm)} mm "
                                        f"(± {_vec(fit.pose_sigma['translation_mm'], 4)})"),
        "pose: rotation angle": Cell(f"{pose_angles:.4f}° (± {_vec(fit.pose_sigma['rotation_deg'], 4)}° "
                                     "per rotation-vector component)"),
        "condition number": number(fit.condition_number, 1, key="condition_number"),
        "solver evaluations": number(fit.nfev, 0, key="nfev"),
    }
    if fit.isocenter_correction_mm is not None:
        items["isocenter correction (device)"] = Cell(
            f"{_vec(fit.isocenter_correction_mm)} mm (± {_vec(fit.isocenter_correction_sigma_mm, 4)})",
            key="isocenter_correction_mm", value=[float(v) for v in fit.isocenter_correction_mm])
    outliers = sum(1 for m in fit.markers if m["outlier"])
    body = [
        "<h2>Fit</h2>",
        key_value_table(items, table_id="fit"),
        "<p class=\"sub\">The degree-0 and degree-1 terms are fixed (ideal): a constant shift is the "
        "phantom's translation, the antisymmetric linear part its rotation, and the symmetric linear "
        "part the gradient calibration, which belongs to scanner QA. Standard errors are the "
        "Gauss-Newton estimate s² (JᵀJ)⁻¹ at the solution, with the robust loss's weights; they "
        "assume independent centroid errors, include any misfit of the model (a degree too low "
        "inflates them) and say nothing of a wrong phantom definition.</p>",
        "<h2>Scans</h2>",
        table(["scan", "detected", "matched", "missing", "spurious", "rejected blobs",
               "isocenter offset (device, mm)", "residual rms (mm)"], _scan_rows(scans), table_id="scans"),
        "<h2>Residuals</h2>",
        figure(residual_figure(fit.markers, radius_device_mm),
               "Left: distance between each detected marker and its prediction, with the rigid pose "
               "alone (grey: the distortion) and with the fitted coil model (blue). Right: the "
               "residual components of the full model.", fig_id="fig-residuals", alt="marker residuals"),
        "<h2>Coil model</h2>",
        figure(figs.coil_planes_figure(fit.coil),
               f"Displacement of the fitted model on the device frame's principal planes, out to the "
               f"valid radius ({fit.coil.valid_radius_mm:.0f} mm).", fig_id="fig-coil",
               alt="fitted coil model displacement maps"),
        "<h2>Coefficients</h2>",
        table(["axis", "kind", "n", "m", "value", "std. error", f"≥ {RESOLVED_SIGMAS:g} σ"],
              _coefficient_rows(fit.coefficients), table_id="coefficients",
              caption="Schmidt semi-normalised, dimensionless; degree 0 and 1 fixed."),
        f"<h2>Markers ({outliers} flagged as outliers)</h2>",
        table(["scan", "marker", "definition (mm)", "detected (RAS mm)", "residual (RAS mm)",
               "|residual| (mm)", "rigid only (mm)", "robust weight", ""],
              _marker_rows(fit.markers, ids), table_id="markers",
              caption="Largest residual first."),
    ]
    return page(f"Phantom fit: {phantom_name}", "\n".join(body))
