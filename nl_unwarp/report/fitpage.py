"""Report page of a coil model fitted to field samples.

Rendered from the fit's summary record (:func:`nl_unwarp.interfaces.fit.fit_field_sample_files`),
the fitted model and the samples; nothing here reads or writes files. The page shows
the residuals per axis, the held-out error per degree, the predicted error against
the radius (growing outside the sampled sphere), the warnings and the coefficients.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
from matplotlib.figure import Figure

from .figures import _png
from .html import Cell, figure, key_value_table, number, page, table
from .pages import coil_page_name, render_coil_page

__all__ = ["coil_page_file_name", "error_radius_figure", "render_fit_page", "render_fit_pages",
           "residual_figure"]

_AXIS_COLOURS = {"x": "#1f6feb", "y": "#1a7f37", "z": "#bf3989"}
#: Largest number of samples drawn per axis in the residual figure (a seeded subset beyond).
MAX_DRAWN = 4000


def coil_page_file_name(sha256: str) -> str:
    """File name of the fitted model's coil page (as every report names coil pages)."""
    return coil_page_name(sha256)


def _residuals(model, samples: Mapping) -> dict:
    out = {}
    for c, name in enumerate(("x", "y", "z")):
        points, encoded = samples[name]
        predicted = model.encode(points, jacobian=False)[0][:, c]
        out[name] = (np.asarray(points), predicted - np.asarray(encoded))
    return out


def residual_figure(residuals: Mapping[str, tuple[np.ndarray, np.ndarray]]) -> bytes:
    """Residual (mm) against polar angle from +z, per axis, coloured by sample radius."""
    fig = Figure(figsize=(11.5, 3.4), layout="constrained")
    axes = fig.subplots(1, 3, sharey=False)
    rng = np.random.default_rng(0)
    scatter = None
    for ax, (name, (points, res)) in zip(axes, residuals.items(), strict=True):
        pick = (np.arange(res.size) if res.size <= MAX_DRAWN
                else rng.choice(res.size, MAX_DRAWN, replace=False))
        radius = np.linalg.norm(points[pick], axis=1)
        polar = np.degrees(np.arccos(np.clip(points[pick, 2] / np.maximum(radius, 1e-12), -1, 1)))
        scatter = ax.scatter(polar, res[pick], c=radius, s=4, cmap="viridis")
        ax.axhline(0, color="k", linewidth=0.6)
        ax.set_title(f"{name} coil: residual of the encoded position", fontsize=9)
        ax.set_xlabel("polar angle from +z (deg)")
        ax.set_ylabel("fit - sample (mm)")
        ax.grid(alpha=0.3)
    if scatter is not None:
        fig.colorbar(scatter, ax=axes, label="sample radius (mm)", shrink=0.9)
    return _png(fig)


def _cv_figure(axes_record: Mapping) -> bytes:
    fig = Figure(figsize=(5.6, 3.4), layout="constrained")
    ax = fig.subplots()
    for name, a in axes_record.items():
        scores = np.array([[d, r if r is not None else np.nan] for d, r, _ in a["cv_scores"]], float)
        if scores.size:
            ax.semilogy(scores[:, 0], scores[:, 1], "o-", markersize=3, color=_AXIS_COLOURS[name],
                        label=f"{name} (chosen {a['degree']})")
            ax.axvline(a["degree"], color=_AXIS_COLOURS[name], linewidth=0.8, linestyle=":")
    ax.set_xlabel("degree")
    ax.set_ylabel("held-out rms residual (mm)")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=7)
    return _png(fig)


def error_radius_figure(record: Mapping) -> bytes:
    """Predicted error (max and rms on spheres) against radius, the valid radius marked."""
    fig = Figure(figsize=(6.4, 3.6), layout="constrained")
    ax = fig.subplots()
    rows = record["error_vs_radius"]
    radius = np.array([r["radius_mm"] for r in rows], float)
    for key, style, label in (("max_mm", "o-", "max on the sphere"), ("rms_mm", "s--", "rms on the sphere")):
        values = np.array([r[key] for r in rows], float)
        ax.semilogy(radius, np.maximum(values, 1e-12), style, markersize=3, label=label)
    ax.axvline(record["valid_radius_mm"], color="#00a0d0", linestyle="--", linewidth=1.2,
               label=f"valid radius {record['valid_radius_mm']:.0f} mm")
    if record["sampled_radius_mm"] != record["valid_radius_mm"]:
        ax.axvline(record["sampled_radius_mm"], color="#999", linestyle=":", label="sampled radius")
    ax.set_xlabel("radius from the isocenter (mm)")
    ax.set_ylabel("predicted error of |u| (mm)")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=7)
    return _png(fig)


def _axes_table(record: Mapping) -> str:
    rows = []
    for name, a in record["axes"].items():
        rows.append([
            name,
            Cell(str(a["degree"]), key=f"{name}.degree", value=a["degree"], num=True),
            Cell(str(a["terms"]), key=f"{name}.terms", value=a["terms"], num=True),
            Cell(str(a["samples"]), key=f"{name}.samples", value=a["samples"], num=True),
            number(a["residual_rms_mm"], 4, key=f"{name}.residual_rms_mm"),
            number(a["residual_max_mm"], 4, key=f"{name}.residual_max_mm"),
            number(a["cv_rms_mm"], 4, key=f"{name}.cv_rms_mm"),
            number(a["predicted_error_max_mm"], 4, key=f"{name}.predicted_error_max_mm"),
            Cell(f"{a['condition_number']:.3g}", key=f"{name}.condition_number",
                 value=a["condition_number"], num=True),
            number(a["sampled_radius_mm"], 1, key=f"{name}.sampled_radius_mm"),
        ])
    return table(["axis", "degree", "terms", "samples", "residual rms (mm)", "residual max (mm)",
                  "held-out rms (mm)", "predicted max error (mm)", "condition", "sampled radius (mm)"],
                 rows, table_id="axes")


def _radius_table(record: Mapping) -> str:
    valid = record["valid_radius_mm"]
    rows = []
    for r in record["error_vs_radius"]:
        key = f"{r['radius_mm']:g}"
        rows.append([number(r["radius_mm"], 1, key=f"radius_mm.{key}"),
                     number(r["radius_mm"] / valid, 2),
                     number(r["rms_mm"], 4, key=f"rms_mm.{key}"),
                     number(r["max_mm"], 4, key=f"max_mm.{key}"),
                     "yes" if r["radius_mm"] <= valid * (1 + 1e-9) else "no (extrapolated)"])
    return table(["radius (mm)", "/ valid radius", "rms (mm)", "max (mm)", "inside valid radius"], rows,
                 table_id="error-radius")


def _coefficient_table(model) -> str:
    terms = set()
    for name in ("x", "y", "z"):
        ax = model.axes[name]
        for kind, tab in (("cos", ax.alpha), ("sin", ax.beta)):
            for n, m in zip(*np.nonzero(tab), strict=True):
                terms.add((int(n), int(m), kind))
    rows = []
    for n, m, kind in sorted(terms):
        cells = [str(n), str(m), kind]
        for name in ("x", "y", "z"):
            ax = model.axes[name]
            tab = ax.alpha if kind == "cos" else ax.beta
            value = float(tab[n, m]) if n < tab.shape[0] else 0.0
            cells.append(Cell(f"{value:.4e}" if value else "-", key=f"{name}.{kind}.{n}.{m}",
                              value=value, num=True))
        rows.append(cells)
    return table(["n", "m", "kind", "x", "y", "z"], rows, table_id="coefficients")


def _growth_sentence(record: Mapping) -> str:
    rows = record["error_vs_radius"]
    valid = record["valid_radius_mm"]
    if not rows or record["predicted_error_max_mm"] is None:
        return "The predicted error is unknown (no comparison fit was possible)."
    inside = record["predicted_error_max_mm"]
    pick = {round(r["radius_mm"] / valid, 2): r["max_mm"] for r in rows}
    parts = [f"{pick[f]:.3g} mm at {f:g}× the valid radius" for f in (1.1, 1.25, 1.5) if f in pick]
    growth = record.get("growth_exponent")
    rate = f", growing about as r^{growth:.1f}" if growth is not None else ""
    return (f"Inside the valid radius ({valid:.1f} mm) the predicted error is at most {inside:.3g} mm. "
            f"Outside it the error grows fast: {', '.join(parts)}{rate}. Do not trust the model beyond "
            "the sampled sphere.")


def render_fit_page(record: Mapping, model, samples: Mapping, *, coil_href: str | None = None) -> str:
    """The fit's page, from its summary record, the fitted model and the samples."""
    residuals = _residuals(model, samples)
    items = {
        "label": Cell(model.label, key="label", value=model.label),
        "coil model": Cell(f'<a href="{coil_href}">{coil_href}</a>' if coil_href else "-", raw_html=True),
        "SHA-256": Cell(str(record["coil_model"].get("sha256")), key="sha256"),
        "degree choice": Cell(record["degree_choice"], key="degree_choice"),
        "symmetry": Cell(record["symmetry"], key="symmetry"),
        "reference radius": number(record["reference_radius_mm"], 1, key="reference_radius_mm", unit="mm"),
        "valid radius": number(record["valid_radius_mm"], 1, key="valid_radius_mm", unit="mm"),
        "sampled radius": number(record["sampled_radius_mm"], 1, key="sampled_radius_mm", unit="mm"),
        "predicted error inside (max)": number(record["predicted_error_max_mm"], 4,
                                               key="predicted_error_max_mm", unit="mm"),
        "predicted error inside (rms)": number(record["predicted_error_rms_mm"], 4,
                                               key="predicted_error_rms_mm", unit="mm"),
    }
    inputs = [[name, i["file"], Cell(str(i["samples"]), num=True), number(i["gradient_mT_per_m"], 3),
               i["frame"]] for name, i in record.get("inputs", {}).items()]
    warnings = record.get("warnings", [])
    warn_html = (table(["axis", "code", "meaning"], [[w["axis"] or "all", w["code"], w["message"]]
                                                    for w in warnings], table_id="warnings")
                 if warnings else '<p class="ok" id="warnings">No warnings.</p>')
    body = [
        "<h2>Fit</h2>", key_value_table(items, table_id="fit"),
        "<h2>Inputs</h2>",
        table(["axis", "file", "samples", "nominal gradient (mT/m)", "frame"], inputs, table_id="inputs"),
        "<h2>Warnings</h2>", warn_html,
        "<h2>Residuals per axis</h2>", _axes_table(record),
        figure(residual_figure(residuals),
               "Fitted minus sampled encoded position at each sample, against the polar angle from +z, "
               "coloured by the sample's radius. Structure (rather than noise) means missing terms.",
               fig_id="fig-residuals", alt="residuals per axis"),
        figure(_cv_figure(record["axes"]),
               "Held-out (leave-one-out) rms residual per candidate degree; dotted: the chosen degree "
               "(the smallest within one standard error of the best).", fig_id="fig-cv",
               alt="held-out error"),
        "<h2>Predicted error against radius</h2>",
        f'<p id="growth">{_growth_sentence(record)}</p>',
        figure(error_radius_figure(record),
               "Difference between the fitted model and a fit two degrees higher to the same samples, "
               "on spheres about the isocenter: an estimate of the model's error, small where samples "
               "constrain it and growing fast beyond them.", fig_id="fig-error-radius",
               alt="predicted error against radius"),
        _radius_table(record),
        "<h2>Coefficients (Schmidt, dimensionless)</h2>", _coefficient_table(model),
    ]
    return page(f"Coil model fit: {model.label}", "\n".join(body))


def render_fit_pages(record: Mapping, model, samples: Mapping) -> tuple[str, str]:
    """The fit page and the fitted model's coil page (linked from the fit page)."""
    sha = record["coil_model"]["sha256"]
    return (render_fit_page(record, model, samples, coil_href=coil_page_file_name(sha)),
            render_coil_page(model, sha))
