"""Report figures with matplotlib's Agg canvas (no display, no pyplot state).

Every function returns PNG bytes. Volumes are shown on three orthogonal planes
through the field-of-view centre, laid out as the closest RAS orientation of
the grid (letters at the edges say which way is which); planes larger than
:data:`MAX_PIXELS` are shown with a stride.
"""

from __future__ import annotations

import io
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import TwoSlopeNorm
from matplotlib.figure import Figure

__all__ = [
    "MAX_PIXELS",
    "Plane",
    "before_after_figures",
    "coil_planes_figure",
    "dataset_figure",
    "jacobian_figure",
    "magnitude_figure",
    "orthogonal_planes",
    "slice_profile_figure",
]

#: Largest number of pixels along a side of a shown plane (stride beyond).
MAX_PIXELS = 192
DPI = 80
_RADIUS_STYLE = {"colors": "#00c8ff", "linestyles": "--", "linewidths": 1.4}
# (name, normal RAS axis, horizontal RAS axis, vertical RAS axis, edge letters l, r, b, t)
_PLANES = (("sagittal", 0, 1, 2, "PAIS"), ("coronal", 1, 0, 2, "LRIS"), ("axial", 2, 0, 1, "LRPA"))


@dataclass
class Plane:
    """One displayed plane of a voxel grid.

    ``take`` maps a volume (X, Y, Z, ...) to the shown 2-D array (rows:
    vertical axis bottom to top, columns: horizontal axis left to right).
    """

    name: str
    normal: int
    index: int
    h_axis: int
    h_flip: bool
    v_axis: int
    v_flip: bool
    zooms: np.ndarray
    stride: int
    letters: str

    def take(self, volume: np.ndarray) -> np.ndarray:
        # Basic indexing gives a view: only the shown pixels are copied (np.take
        # would copy the slice of a whole, perhaps Fortran-ordered, volume).
        sl = volume[(slice(None),) * self.normal + (self.index,)]
        rest = [a for a in range(3) if a != self.normal]
        if rest.index(self.v_axis) != 0:
            sl = np.swapaxes(sl, 0, 1)
        if self.v_flip:
            sl = sl[::-1]
        if self.h_flip:
            sl = sl[:, ::-1]
        return np.ascontiguousarray(sl[:: self.stride, :: self.stride])

    def values(self, volume, shape: Sequence[int] | None = None) -> np.ndarray:
        """``take(volume)``; or, for a function of voxel indices (..., 3), its values on the shown pixels."""
        return volume(self.ijk(shape)) if callable(volume) else self.take(volume)

    def ijk(self, shape: Sequence[int]) -> np.ndarray:
        """Voxel indices (rows, cols, 3) of the shown pixels."""
        grids = np.meshgrid(*[np.arange(n) for n in shape[:3]], indexing="ij", sparse=True)
        full = [np.broadcast_to(g, tuple(shape[:3])) for g in grids]
        return np.stack([self.take(g) for g in full], -1).astype(float)

    def extent_mm(self, shown: np.ndarray) -> tuple[float, float, float, float]:
        zh, zv = self.zooms[self.h_axis] * self.stride, self.zooms[self.v_axis] * self.stride
        return (0.0, shown.shape[1] * zh, 0.0, shown.shape[0] * zv)

    def pixel_mm(self) -> tuple[float, float]:
        return self.zooms[self.h_axis] * self.stride, self.zooms[self.v_axis] * self.stride

    def offsets_mm(self, disp_ras_mm, affine: np.ndarray, shape=None) -> tuple[np.ndarray, np.ndarray]:
        """In-plane components (horizontal, vertical; shown mm) of a RAS displacement on the plane.

        ``disp_ras_mm`` is the (X, Y, Z, 3) displacement, or a function from
        voxel indices (..., 3) to the RAS displacement there (mm), evaluated
        on the shown pixels only (then ``shape``, the grid's, is needed).
        """
        shown = self.values(disp_ras_mm, shape)
        dijk = shown @ np.linalg.inv(np.asarray(affine, float)[:3, :3]).T
        dh = dijk[..., self.h_axis] * self.zooms[self.h_axis] * (-1 if self.h_flip else 1)
        dv = dijk[..., self.v_axis] * self.zooms[self.v_axis] * (-1 if self.v_flip else 1)
        return dh, dv


def orthogonal_planes(shape: Sequence[int], affine: np.ndarray, centre_ijk=None) -> list[Plane]:
    """Sagittal, coronal and axial planes (closest to the grid's axes) through a voxel."""
    import nibabel as nib

    ornt = nib.orientations.io_orientation(np.asarray(affine, float))
    axis_of = {int(ornt[v, 0]): (v, bool(ornt[v, 1] < 0)) for v in range(3)}
    zooms = np.linalg.norm(np.asarray(affine, float)[:3, :3], axis=0)
    centre = (np.asarray(shape[:3]) - 1) // 2 if centre_ijk is None else np.asarray(centre_ijk, int)
    planes = []
    for name, n_ras, h_ras, v_ras, letters in _PLANES:
        normal, _ = axis_of[n_ras]
        (h, hf), (v, vf) = axis_of[h_ras], axis_of[v_ras]
        stride = max(1, math.ceil(max(shape[h], shape[v]) / MAX_PIXELS))
        planes.append(Plane(name, normal, int(centre[normal]), h, hf, v, vf, zooms, stride, letters))
    return planes


def _png(fig: Figure) -> bytes:
    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    return buf.getvalue()


def _axes_row(n: int, *, height: float = 3.6, colorbar: bool = True):
    """A row of ``n`` image axes with a fixed layout (constrained layout costs a second draw)."""
    bar_in = 0.9 if colorbar else 0.0
    width = 3.7 * n + bar_in
    fig = Figure(figsize=(width, height))
    right = 1 - (bar_in + 0.05) / width
    fig.subplots_adjust(left=0.01, right=right, bottom=0.02, top=0.9, wspace=0.04)
    axes = fig.subplots(1, n, squeeze=False)[0]
    return fig, axes


def _colorbar(fig: Figure, image, label: str) -> None:
    """A colour bar in the space :func:`_axes_row` keeps on the right."""
    width = fig.get_figwidth()
    cax = fig.add_axes((1 - 0.75 / width, 0.12, 0.14 / width, 0.7))
    fig.colorbar(image, cax=cax, label=label)


def _decorate(ax, plane: Plane, shown: np.ndarray) -> None:
    x0, x1, y0, y1 = plane.extent_mm(shown)
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_title(f"{plane.name} (voxel axis {'ijk'[plane.normal]} = {plane.index})", fontsize=9)
    left, right, bottom, top = plane.letters
    from matplotlib import patheffects

    style = {
        "color": "#ffd400",
        "fontsize": 10,
        "fontweight": "bold",
        "path_effects": [patheffects.withStroke(linewidth=2.2, foreground="black")],
    }
    ax.text(x0 + 0.02 * (x1 - x0), (y0 + y1) / 2, left, va="center", ha="left", **style)
    ax.text(x1 - 0.02 * (x1 - x0), (y0 + y1) / 2, right, va="center", ha="right", **style)
    ax.text((x0 + x1) / 2, y0 + 0.02 * (y1 - y0), bottom, va="bottom", ha="center", **style)
    ax.text((x0 + x1) / 2, y1 - 0.02 * (y1 - y0), top, va="top", ha="center", **style)


def _centres(plane: Plane, shown: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    zh, zv = plane.pixel_mm()
    return (np.arange(shown.shape[1]) + 0.5) * zh, (np.arange(shown.shape[0]) + 0.5) * zv


def _radius(ax, plane: Plane, dist: np.ndarray | None, radius_mm: float | None) -> bool:
    """Draw the valid-radius boundary (and hatch beyond it) where the plane reaches it."""
    if dist is None or radius_mm is None or not (dist.min() < radius_mm < dist.max()):
        return False
    hc, vc = _centres(plane, dist)
    ax.contour(hc, vc, dist, levels=[radius_mm], **_RADIUS_STYLE)
    ax.contourf(hc, vc, dist, levels=[radius_mm, float(dist.max()) + 1], colors="none", hatches=["////"])
    return True


def _anatomy(ax, plane: Plane, shown: np.ndarray, window: tuple[float, float]) -> None:
    ax.imshow(
        shown,
        cmap="gray",
        origin="lower",
        extent=plane.extent_mm(shown),
        vmin=window[0],
        vmax=window[1],
        interpolation="nearest",
    )


def intensity_window(slices: Sequence[np.ndarray]) -> tuple[float, float]:
    """Grey-level window from the 1st to the 99.5th percentile of the shown pixels."""
    values = np.concatenate([np.asarray(s, float).ravel() for s in slices])
    values = values[np.isfinite(values)]
    if values.size == 0:
        return 0.0, 1.0
    lo, hi = np.percentile(values, [1.0, 99.5])
    return float(lo), float(hi if hi > lo else lo + 1.0)


def _nice_levels(vmax: float) -> list[float]:
    """Up to five round contour levels below ``vmax`` (mm)."""
    if not vmax > 0:
        return []
    step = 10 ** math.floor(math.log10(vmax / 4))
    for factor in (1, 2, 5, 10):
        if vmax / (step * factor) <= 5:
            step *= factor
            break
    return [float(v) for v in np.arange(step, vmax, step)][:5]


@dataclass
class VolumeViews:
    """What every per-image figure needs on its three planes."""

    planes: list[Plane]
    anatomy: list[np.ndarray]
    window: tuple[float, float]
    distance_mm: list[np.ndarray]
    valid_radius_mm: float | None


def volume_views(anatomy: np.ndarray, affine: np.ndarray, isocenter_ras_mm, valid_radius_mm) -> VolumeViews:
    """Planes through the field-of-view centre, their anatomy and distance to the isocenter."""
    from .stats import distance_to_isocenter_mm

    planes = orthogonal_planes(anatomy.shape, affine)
    shown = [p.take(anatomy) for p in planes]
    dist = [distance_to_isocenter_mm(affine, p.ijk(anatomy.shape), isocenter_ras_mm) for p in planes]
    return VolumeViews(planes, shown, intensity_window(shown), dist, valid_radius_mm)


def magnitude_figure(views: VolumeViews, magnitude_mm: np.ndarray, vmax_mm: float) -> tuple[bytes, bool]:
    """Displacement magnitude over the anatomy; returns the PNG and whether the boundary was drawn."""
    fig, axes = _axes_row(len(views.planes))
    levels = _nice_levels(vmax_mm)
    drawn, im = False, None
    for ax, plane, anat, dist in zip(axes, views.planes, views.anatomy, views.distance_mm, strict=True):
        _anatomy(ax, plane, anat, views.window)
        mag = plane.take(magnitude_mm)
        im = ax.imshow(
            mag,
            cmap="inferno",
            alpha=0.55,
            origin="lower",
            extent=plane.extent_mm(mag),
            vmin=0,
            vmax=vmax_mm or 1.0,
            interpolation="bilinear",
        )
        if levels and float(mag.max()) > levels[0]:
            hc, vc = _centres(plane, mag)
            cs = ax.contour(hc, vc, mag, levels=levels, colors="white", linewidths=0.7)
            ax.clabel(cs, fontsize=7, fmt="%g")
        drawn |= _radius(ax, plane, dist, views.valid_radius_mm)
        _decorate(ax, plane, anat)
    _colorbar(fig, im, "|displacement| (mm)")
    return _png(fig), drawn


def _grid_spacing_mm(width_mm: float) -> float:
    for step in (5, 10, 15, 20, 25, 30, 40, 50, 75, 100):
        if width_mm / step <= 10:
            return float(step)
    return 200.0


def _grid_lines(plane: Plane, shown: np.ndarray, offsets: tuple[np.ndarray, np.ndarray] | None):
    """Grid lines (h, v arrays, shown mm): straight, or moved by the in-plane offsets."""
    from scipy.ndimage import map_coordinates

    x0, x1, y0, y1 = plane.extent_mm(shown)
    step = _grid_spacing_mm(max(x1 - x0, y1 - y0))
    zh, zv = plane.pixel_mm()
    lines = []
    t_h, t_v = np.linspace(x0, x1, 160), np.linspace(y0, y1, 160)
    for c in np.arange(x0 + step / 2, x1, step):
        lines.append((np.full_like(t_v, c), t_v))
    for c in np.arange(y0 + step / 2, y1, step):
        lines.append((t_h, np.full_like(t_h, c)))
    if offsets is None:
        return lines
    moved = []
    for h, v in lines:
        coords = np.stack([v / zv - 0.5, h / zh - 0.5])
        dh = map_coordinates(offsets[0], coords, order=1, mode="nearest")
        dv = map_coordinates(offsets[1], coords, order=1, mode="nearest")
        moved.append((h + dh, v + dv))
    return moved


def before_after_figures(
    views: VolumeViews,
    raw: np.ndarray,
    corrected: np.ndarray | None,
    disp_ras_mm,
    affine: np.ndarray,
) -> tuple[bytes, bytes | None]:
    """The raw image with the true grid as the scanner bent it, and the corrected image with it straight.

    A grid line drawn at true positions :math:`p` appears in the raw image at
    :math:`p + d(p)` (in-plane part shown); after correction it is straight again.
    ``disp_ras_mm``: the (X, Y, Z, 3) displacement (RAS mm) or a function of
    voxel indices (see :meth:`Plane.offsets_mm`).
    """
    pngs = []
    for image, bent in ((raw, True), (corrected, False)):
        if image is None:
            pngs.append(None)
            continue
        fig, axes = _axes_row(len(views.planes), colorbar=False)
        for ax, plane, dist in zip(axes, views.planes, views.distance_mm, strict=True):
            shown = plane.take(image)
            _anatomy(ax, plane, shown, views.window)
            offsets = plane.offsets_mm(disp_ras_mm, affine, raw.shape[:3]) if bent else None
            for h, v in _grid_lines(plane, shown, offsets):
                ax.plot(h, v, color="#39d353", linewidth=0.8, alpha=0.9)
            x0, x1, y0, y1 = plane.extent_mm(shown)
            ax.set_xlim(x0, x1)
            ax.set_ylim(y0, y1)
            _radius(ax, plane, dist, views.valid_radius_mm)
            _decorate(ax, plane, shown)
        fig.subplots_adjust(top=0.84)
        fig.suptitle(
            "before: raw image, true grid as encoded" if bent else "after: corrected image, true grid",
            fontsize=10,
        )
        pngs.append(_png(fig))
    return pngs[0], pngs[1]


def jacobian_figure(
    views: VolumeViews, jacobian, jac_range: tuple[float, float], shape: Sequence[int] | None = None
) -> bytes:
    """Jacobian determinant on the three planes, diverging about 1 over the image's range.

    ``jacobian``: the (X, Y, Z) map, or a function of voxel indices (then
    ``shape``, the grid's, is needed; see :meth:`Plane.values`).
    """
    fig, axes = _axes_row(len(views.planes))
    spread = max(abs(jac_range[0] - 1), abs(jac_range[1] - 1), 1e-4)
    norm = TwoSlopeNorm(vcenter=1.0, vmin=1 - spread, vmax=1 + spread)
    im = None
    for ax, plane, dist in zip(axes, views.planes, views.distance_mm, strict=True):
        shown = plane.values(jacobian, shape)
        im = ax.imshow(
            shown,
            cmap="RdBu_r",
            norm=norm,
            origin="lower",
            extent=plane.extent_mm(shown),
            interpolation="bilinear",
        )
        _radius(ax, plane, dist, views.valid_radius_mm)
        _decorate(ax, plane, shown)
    _colorbar(fig, im, "Jacobian determinant")
    return _png(fig)


def slice_profile_figure(profile: Mapping) -> bytes:
    """Through-plane shift, thickness change and bow of each slice, against slice position."""
    fig = Figure(figsize=(11.5, 3.3), layout="constrained")
    axes = fig.subplots(1, 3)
    pos = np.asarray(profile["position_mm"], float)

    def arr(key):
        return np.array([np.nan if v is None else v for v in profile[key]], float)

    for ax, stem, title in (
        (axes[0], "shift", "slice position shift"),
        (axes[1], "thickness_change", "slice thickness change"),
    ):
        mean, lo, hi = arr(f"{stem}_mean_mm"), arr(f"{stem}_min_mm"), arr(f"{stem}_max_mm")
        ax.fill_between(pos, lo, hi, color="#1f6feb", alpha=0.25, label="min..max across the slice")
        ax.plot(pos, mean, "o-", color="#1f6feb", markersize=3, label="mean")
        ax.axhline(0, color="k", linewidth=0.6)
        ax.set_title(title, fontsize=10)
        ax.set_ylabel("mm")
    axes[0].legend(fontsize=7, loc="best")
    axes[2].plot(pos, arr("bow_mm"), "s-", color="#bf3989", markersize=3)
    axes[2].set_title("slice curvature (bow: peak-to-peak off its best-fit plane)", fontsize=9)
    axes[2].set_ylabel("mm")
    for ax in axes:
        ax.set_xlabel("slice position along the normal (mm)")
        ax.grid(alpha=0.3)
    return _png(fig)


def dataset_figure(points: Sequence[Mapping]) -> bytes:
    """Maximum displacement per image, grouped by scanner; flagged images ringed in red.

    ``points``: mappings with ``group``, ``value`` (mm or None), ``decision``, ``flagged``.
    """
    groups = sorted({p["group"] for p in points})
    fig = Figure(figsize=(max(5.0, 1.6 * len(groups) + 2.5), 3.8), layout="constrained")
    ax = fig.subplots()
    markers = {"full": "o", "throughplane": "^", "skip": "s"}
    seen = set()
    for g, group in enumerate(groups):
        members = [p for p in points if p["group"] == group and p["value"] is not None]
        offsets = np.linspace(-0.25, 0.25, len(members)) if len(members) > 1 else [0.0] * len(members)
        for dx, p in zip(offsets, members, strict=True):
            label = p["decision"] if p["decision"] not in seen else None
            seen.add(p["decision"])
            ax.scatter(
                g + dx,
                p["value"],
                marker=markers.get(p["decision"], "D"),
                s=34,
                color="#1f6feb",
                alpha=0.8,
                label=label,
                zorder=3,
            )
            if p["flagged"]:
                ax.scatter(
                    g + dx,
                    p["value"],
                    s=150,
                    facecolors="none",
                    edgecolors="#d1242f",
                    linewidths=1.4,
                    zorder=4,
                    label="flagged" if "flagged" not in seen else None,
                )
                seen.add("flagged")
    ax.set_xticks(range(len(groups)), groups, fontsize=8)
    ax.set_xlim(-0.6, len(groups) - 0.4)
    ax.set_ylabel("max |displacement| in image (mm)")
    ax.set_title("maximum displacement per image, by scanner", fontsize=10)
    ax.grid(axis="y", alpha=0.3)
    if seen:
        ax.legend(fontsize=7, loc="best")
    return _png(fig)


def coil_planes_figure(coil, *, points: int = 121) -> bytes:
    """Displacement magnitude of a coil model on its three principal planes, to its valid radius."""
    radius = coil.valid_radius_mm
    reach = 1.1 * radius
    t = np.linspace(-reach, reach, points)
    a, b = np.meshgrid(t, t)
    fig, axes = _axes_row(3, height=3.9)
    # Room for the axis labels in mm.
    fig.subplots_adjust(left=0.07, bottom=0.13, wspace=0.32)
    maps = []
    for fixed, (i, j) in ((2, (0, 1)), (1, (0, 2)), (0, (1, 2))):
        pts = np.zeros(a.shape + (3,))
        pts[..., i], pts[..., j] = a, b
        mag = np.linalg.norm(coil.displacement(pts), axis=-1)
        mag[np.hypot(a, b) > radius] = np.nan
        maps.append((fixed, i, j, mag))
    vmax = max(float(np.nanmax(m[3])) for m in maps) or 1.0
    im = None
    for ax, (fixed, i, j, mag) in zip(axes, maps, strict=True):
        im = ax.imshow(
            mag, origin="lower", extent=(-reach, reach, -reach, reach), cmap="inferno", vmin=0, vmax=vmax
        )
        levels = _nice_levels(vmax)
        if levels:
            cs = ax.contour(t, t, mag, levels=levels, colors="white", linewidths=0.7)
            ax.clabel(cs, fontsize=7, fmt="%g")
        ax.add_patch(_circle(radius))
        ax.set_title(f"device {'xyz'[i]}{'xyz'[j]} plane ({'xyz'[fixed]} = 0)", fontsize=9)
        ax.set_xlabel(f"{'xyz'[i]} (mm)")
        ax.set_ylabel(f"{'xyz'[j]} (mm)")
    _colorbar(fig, im, "|displacement| (mm)")
    return _png(fig)


def _circle(radius: float):
    from matplotlib.patches import Circle

    return Circle((0, 0), radius, fill=False, edgecolor="#00c8ff", linestyle="--", linewidth=1.4)
