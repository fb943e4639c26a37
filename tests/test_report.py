"""Report pages: their numbers against the summary JSON and closed forms, their figures, their safety."""

from __future__ import annotations

import base64
import io
import json
from html.parser import HTMLParser

import matplotlib.image
import numpy as np
import pytest

from nl_unwarp.api import displacement_table, warp_summary
from nl_unwarp.demo import demo_coil_path
from nl_unwarp.frames import DeviceFrame
from nl_unwarp.io.coilfile import coil_sha256
from nl_unwarp.report.html import CAUTION
from nl_unwarp.report.pages import (
    DatasetEntry,
    ImageInputs,
    render_coil_page,
    render_dataset_page,
    render_image_page,
)
from nl_unwarp.report.stats import (
    decided_by_default,
    displacement_stats,
    head_mask,
    image_flags,
    missing_table_position,
    slice_profile,
)
from nl_unwarp.warp import compute_warp, index_to_ras, slice_normal_ras

#: Shown numbers are rounded to the digits of the page (3 decimals for mm, 4 for
#: the Jacobian); a shown value may differ from the JSON by half a unit in the last place.
SHOWN_MM_TOL = 0.5e-3 + 1e-12
SHOWN_JAC_TOL = 0.5e-4 + 1e-12
#: Float64 arithmetic on the same inputs, summed in a different order.
SAME_NUMBER_TOL = 1e-9
#: The same float32 magnitudes computed along another path (einsum order, float32
#: percentile interpolation): a few float32 epsilons (1.2e-7) relative.
FLOAT32_RTOL = 1e-6
#: A sphere voxelised at 1 mm: the boundary voxels make the count differ from
#: 4/3 pi r^3 by about surface x 0.5 voxel / volume ~ 1.5 / r (r = 30 voxels): 5 %.
SPHERE_VOLUME_RTOL = 0.05


class _Page(HTMLParser):
    """Tables (by id: rows of cells with text and data attributes), images, links, scripts."""

    def __init__(self) -> None:
        super().__init__()
        self.tables, self.images, self.urls, self.ids, self.inputs = {}, {}, [], set(), []
        self._table = self._cell = self._figure = None
        self.text = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.add(a["id"])
        for key in ("src", "href"):
            if key in a:
                self.urls.append(a[key])
        if tag == "table":
            self._table = self.tables.setdefault(a.get("id"), [])
        elif tag == "tr" and self._table is not None:
            self._table.append([])
        elif tag == "td" and self._table is not None:
            self._cell = {"key": a.get("data-key"), "value": a.get("data-value"), "text": ""}
            self._table[-1].append(self._cell)
        elif tag == "figure":
            self._figure = a.get("id")
        elif tag == "img" and self._figure:
            self.images[self._figure] = a["src"]
        elif tag == "input":
            self.inputs.append(a)

    def handle_endtag(self, tag):
        if tag == "table":
            self._table = None
        elif tag == "td":
            self._cell = None
        elif tag == "figure":
            self._figure = None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell["text"] += data

    def cells(self, table_id: str) -> dict:
        """data-key -> cell of one table."""
        return {c["key"]: c for row in self.tables[table_id] for c in row if c["key"]}


def parse(html: str) -> _Page:
    page = _Page()
    page.feed(html)
    page.close()
    return page


def shown(cell) -> float:
    return float(cell["text"].split()[0])


def exact(cell):
    import ast

    return ast.literal_eval(cell["value"])


def check_png(src: str) -> np.ndarray:
    """A data-URI PNG that decodes to a picture with something in it."""
    assert src.startswith("data:image/png;base64,")
    raw = base64.b64decode(src.split(",", 1)[1])
    assert raw[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, ISO/IEC 15948, 5.2)
    pixels = matplotlib.image.imread(io.BytesIO(raw), format="png")
    assert pixels.shape[0] > 100 and pixels.shape[1] > 200
    assert float(pixels[..., :3].std()) > 0.02  # not a blank canvas
    return pixels


def check_self_contained(page: _Page, html: str) -> None:
    for url in page.urls:
        assert not url.startswith(("http:", "https:", "//", "file:")), url
    assert "<link" not in html and "@import" not in html
    assert sum(CAUTION in t for t in page.text) >= 2  # top and footer


# --- stats -------------------------------------------------------------------------------------


def _sphere(shape, radius_vox, inside=100.0):
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1)
    centre = (np.asarray(shape) - 1) / 2
    return np.where(np.linalg.norm(ijk - centre, axis=-1) <= radius_vox, inside, 0.0).astype(np.float32)


def test_head_mask_of_a_noisy_sphere_has_the_sphere_volume(rng):
    radius = 30.0
    image = _sphere((80, 80, 80), radius) + rng.normal(0, 2.0, (80, 80, 80)).astype(np.float32)
    mask = head_mask(image)
    # Volume of a ball, 4/3 pi r^3 (Archimedes).
    assert mask.sum() == pytest.approx(4 / 3 * np.pi * radius**3, rel=SPHERE_VOLUME_RTOL)
    assert not head_mask(np.zeros((4, 4, 4))).any()


def test_displacement_stats_are_numpy_max_and_percentiles(rng):
    mag = rng.gamma(2.0, 1.0, (20, 20, 20)).astype(np.float32)
    mask = rng.random((20, 20, 20)) > 0.5
    got = displacement_stats(mag, mask)
    assert got["image"]["max_mm"] == float(mag.max())
    assert got["head"]["p95_mm"] == pytest.approx(float(np.percentile(mag[mask], 95)), rel=FLOAT32_RTOL)
    assert got["head"]["voxels"] == int(mask.sum())
    assert displacement_stats(mag, np.zeros_like(mask))["head"]["max_mm"] is None


@pytest.mark.parametrize("flip", [False, True], ids=["RAS", "z-flipped"])
def test_slice_profile_matches_a_field_built_by_hand(flip):
    """Through-plane field c0 + c1 z + c2 (x^2 + y^2): shift, thickness change and bow in closed form."""
    shape, zooms = (21, 17, 9), (2.0, 2.5, 3.0)
    affine = np.diag([*zooms, 1.0])
    affine[:3, 3] = [-20.0, -20.0, -12.0]
    if flip:
        affine[2, 2], affine[2, 3] = -zooms[2], 12.0
    c0, c1, c2 = 0.3, 0.02, 1e-3
    ras = index_to_ras(affine, np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1))
    r2 = ras[..., 0] ** 2 + ras[..., 1] ** 2
    disp = np.zeros(shape + (3,))
    disp[..., 2] = c0 + c1 * ras[..., 2] + c2 * r2
    prof = slice_profile(disp, affine, 2)
    sign = -1.0 if flip else 1.0  # the normal follows the slice axis
    for k in range(shape[2]):
        z = ras[0, 0, k, 2]
        assert prof["shift_mean_mm"][k] == pytest.approx(sign * (c0 + c1 * z + c2 * r2[..., k].mean()))
        assert prof["shift_max_mm"][k] - prof["shift_min_mm"][k] == pytest.approx(c2 * np.ptp(r2[..., k]))
        # A plane a + b x + c y cannot take up x^2 + y^2 on this grid beyond its linear part:
        # the bow is the ptp of the residual of that least-squares fit (numpy.linalg.lstsq).
        design = np.stack([np.ones(r2[..., k].size), ras[..., k, 0].ravel(), ras[..., k, 1].ravel()], -1)
        resid = r2[..., k].ravel() - design @ np.linalg.lstsq(design, r2[..., k].ravel(), rcond=None)[0]
        assert prof["bow_mm"][k] == pytest.approx(c2 * np.ptp(resid))
        # d(d_n)/dn = c1 along the normal for either sign; times the thickness.
        assert prof["thickness_change_mean_mm"][k] == pytest.approx(c1 * zooms[2])
    assert prof["thickness_mm"] == pytest.approx(zooms[2])


def test_flags_far_off_isocenter_missing_table_and_default_decision():
    summary = {"isocenter_ras_mm": [0.0, 0.0, 40.0], "isocenter_offset_from": "table position"}
    plain = {
        "action": "full",
        "reason": "not corrected by the scanner (NonlinearGradientCorrection=False)",
        "warnings": [],
    }
    assert image_flags(summary=summary, decision=plain, fov_centre_ras_mm=[0, 0, 0]) == [
        "far off isocenter (40 mm)"
    ]
    assert image_flags(summary=summary, decision=plain, fov_centre_ras_mm=[0, 0, 30]) == []
    by_policy = dict(
        plain, reason="no NonlinearGradientCorrection flag and no ImageType token; site policy: correct"
    )
    assert decided_by_default(by_policy) and not decided_by_default(plain)
    no_table = dict(plain, warnings=["TablePosition missing: assuming the world origin is the isocenter"])
    assert missing_table_position(no_table) and not decided_by_default(no_table)
    no_position = dict(plain, warnings=["PatientPosition missing: assuming HFS"])
    assert decided_by_default(no_position)
    assert image_flags(summary=None, decision=no_table) == ["no table position"]


# --- the per-image page ------------------------------------------------------------------------

SHAPE, VOXEL_MM = (40, 40, 30), 5.0
#: Isocenter offset that puts the top of the field of view beyond the demo
#: coil's valid radius (220 mm), so that the boundary is drawn.
OFFSET_BEYOND_MM = (0.0, 0.0, 150.0)


def _grid_affine(zooms=(VOXEL_MM,) * 3):
    affine = np.diag([*zooms, 1.0])
    affine[:3, 3] = -np.asarray(zooms) * (np.asarray(SHAPE) - 1) / 2
    return affine


@pytest.fixture
def case(demo_coil):
    def build(mode="full", zooms=(VOXEL_MM,) * 3, offset=OFFSET_BEYOND_MM, **extra):
        affine = _grid_affine(zooms)
        frame = DeviceFrame("HFS", offset)
        warp = compute_warp(demo_coil, SHAPE, affine, frame, mode=mode)
        summary = json.loads(
            json.dumps(warp_summary(warp, demo_coil, demo_coil_path(), frame, "table position"))
        )
        summary.update(extra)
        raw = _sphere(SHAPE, 14.0)
        inputs = ImageInputs(
            "sub-01/anat/sub-01_T1w.nii.gz",
            raw,
            affine,
            summary,
            warp.disp_ras_mm,
            warp.jacobian,
            corrected=raw[::-1].copy(),
            decision={
                "action": mode,
                "reason": "not corrected by the scanner",
                "rule": "fictive-any",
                "site": "northfield",
                "coil_model": "northfield",
                "position": "HFS",
                "warnings": [],
            },
            metadata={
                "MRAcquisitionType": "2D" if mode != "full" else "3D",
                "NonlinearGradientCorrection": False,
                "TablePosition": [0, 0, -150],
            },
            coil_page_href="coil-x.html",
        )
        return inputs, warp, summary

    return build


def test_image_page_numbers_equal_the_summary(case):
    inputs, warp, summary = case()
    html = render_image_page(inputs)
    page = parse(html)
    check_self_contained(page, html)
    ident = page.cells("identity")
    assert exact(ident["coil_sha256"]) == summary["coil_model"]["sha256"] == coil_sha256(demo_coil_path())
    assert exact(ident["coil_label"]) == summary["coil_model"]["label"]
    assert exact(ident["isocenter_ras_mm"]) == summary["isocenter_ras_mm"]
    assert exact(ident["isocenter_offset_from"]) == "table position"
    warp_cells = page.cells("warp")
    for key, tol in (("jacobian_min", SHOWN_JAC_TOL), ("jacobian_max", SHOWN_JAC_TOL)):
        assert exact(warp_cells[key]) == summary[key]
        assert shown(warp_cells[key]) == pytest.approx(summary[key], abs=tol)
    assert (
        exact(warp_cells["displacement_max_inside_valid_mm"]) == summary["displacement_max_inside_valid_mm"]
    )
    disp = page.cells("displacement")
    # The page recomputes from the field; the summary came from the warp: the same numbers.
    assert exact(disp["image.max_mm"]) == pytest.approx(summary["displacement_max_mm"], rel=FLOAT32_RTOL)
    assert shown(disp["image.max_mm"]) == pytest.approx(summary["displacement_max_mm"], abs=SHOWN_MM_TOL)
    assert exact(disp["image.p99_mm"]) == pytest.approx(summary["displacement_p99_mm"], rel=FLOAT32_RTOL)
    # Head mask: the sphere of the raw image, exactly (a noise-free binary image).
    sphere = _sphere(SHAPE, 14.0) > 0
    assert exact(disp["head.voxels"]) == int(sphere.sum())
    assert exact(disp["head.max_mm"]) == pytest.approx(
        float(warp.magnitude_mm[sphere].max()), rel=FLOAT32_RTOL
    )
    # No coil file path, only its hash.
    assert str(demo_coil_path()) not in html and str(demo_coil_path().parent) not in html


def test_image_page_figures_toggle_boundary_and_decision(case):
    inputs, _, summary = case()
    page = parse(render_image_page(inputs))
    for fig in ("fig-magnitude", "fig-before", "fig-after", "fig-jacobian"):
        check_png(page.images[fig])
    radios = [i for i in page.inputs if i.get("type") == "radio"]
    assert len(radios) == 2 and {r["name"] for r in radios} == {"before-after"}
    assert page.images["fig-before"] != page.images["fig-after"]
    text = " ".join(page.text)
    assert "dashed cyan line is the coil model's valid radius (220 mm)" in text
    assert f"{summary['jacobian_min']:.4f} .. {summary['jacobian_max']:.4f}" in text
    decision = page.cells("decision")
    assert exact(decision["action"]) == "full" and exact(decision["site"]) == "northfield"
    assert page.cells("metadata")["TablePosition"]["text"] == "[0, 0, -150]"
    assert "fig-slices" not in page.images and "shells" not in page.tables


def test_image_page_inside_the_valid_radius_draws_no_boundary(case):
    inputs, _, _ = case(offset=(0.0, 0.0, 0.0))
    text = " ".join(parse(render_image_page(inputs)).text)
    assert "The shown planes stay inside the valid radius (220 mm)." in text


def test_2d_page_plots_and_tabulates_the_slices(case):
    inputs, warp, _ = case(mode="throughplane", zooms=(VOXEL_MM, VOXEL_MM, 8.0))
    page = parse(render_image_page(inputs))
    check_png(page.images["fig-slices"])
    cells = page.cells("slices")
    normal = slice_normal_ras(inputs.affine, 2)
    valid = ~warp.outside_valid
    empty = [k for k in range(SHAPE[2]) if not valid[..., k].any()]
    assert empty, "the top slices should lie beyond the valid radius"
    for k in empty:
        assert cells[f"shift_mean_mm.{k}"]["text"] == "n/a"
    for k in (0, SHAPE[2] // 2, min(empty) - 1):
        sel = valid[..., k]
        expected = float((warp.disp_ras_mm[..., k, :] @ normal)[sel].mean())
        assert exact(cells[f"shift_mean_mm.{k}"]) == pytest.approx(expected, abs=SAME_NUMBER_TOL)
        assert shown(cells[f"shift_mean_mm.{k}"]) == pytest.approx(expected, abs=SHOWN_MM_TOL)


def test_dwi_page_shows_the_shells_of_the_summary(case):
    shells = [
        {
            "bval": 1000.0,
            "volumes": [1, 2],
            "median_deviation": 0.0123,
            "min_deviation": -0.02,
            "max_deviation": 0.051,
            "min_at_ras_mm": [1.0, 2.0, 3.0],
            "max_at_ras_mm": [0.0, 0.0, 90.0],
        },
        {
            "bval": 2000.0,
            "volumes": [3],
            "median_deviation": 0.0101,
            "min_deviation": -0.01,
            "max_deviation": 0.049,
            "min_at_ras_mm": None,
            "max_at_ras_mm": None,
        },
    ]
    inputs, _, _ = case(diffusion={"mask_voxels": 123, "shells": shells})
    cells = parse(render_image_page(inputs)).cells("shells")
    for i, shell in enumerate(shells):
        assert exact(cells[f"bval.{i}"]) == shell["bval"]
        assert exact(cells[f"median_deviation_percent.{i}"]) == shell["median_deviation"]
        assert shown(cells[f"max_deviation_percent.{i}"]) == pytest.approx(
            100 * shell["max_deviation"], abs=SHOWN_MM_TOL
        )


# --- coil model and dataset pages --------------------------------------------------------------


def test_coil_page_table_equals_the_describe_json(demo_coil, capsys):
    from nl_unwarp.cli import main

    assert main(["describe", str(demo_coil_path()), "--json"]) == 0
    described = json.loads(capsys.readouterr().out)
    html = render_coil_page(demo_coil, coil_sha256(demo_coil_path()))
    page = parse(html)
    check_self_contained(page, html)
    check_png(page.images["fig-coil"])
    cells = page.cells("radii")
    assert [r["radius_mm"] for r in described["displacement"]] == [50.0, 100.0, 150.0, 200.0]
    for row in described["displacement"]:
        key = f"{row['radius_mm']:g}"
        assert exact(cells[f"max_mm.{key}"]) == row["max_mm"]
        assert shown(cells[f"rms_mm.{key}"]) == pytest.approx(row["rms_mm"], abs=SHOWN_MM_TOL)
        assert exact(cells[f"inside_valid_radius.{key}"]) == row["inside_valid_radius"]
    assert exact(page.cells("coil")["sha256"]) == described["sha256"]
    assert displacement_table(demo_coil)[0]["max_mm"] == described["displacement"][0]["max_mm"]


def test_dataset_page_lists_decisions_values_and_flags():
    def summary(dmax, iso_z):
        return {
            "displacement_max_mm": dmax,
            "isocenter_ras_mm": [0.0, 0.0, iso_z],
            "isocenter_offset_from": "table position",
            "coil_model": {"label": "Fictive A", "sha256": "ab" * 32, "degree": 5},
        }

    entries = [
        DatasetEntry(
            "sub-01/anat/sub-01_T1w.nii.gz",
            {"action": "full", "reason": "flag", "rule": "a", "site": "north", "warnings": []},
            summary(2.5, 0.0),
            [],
            "sub-01_T1w.html",
            "coil-ab.html",
        ),
        DatasetEntry(
            "sub-02/anat/sub-02_T1w.nii.gz",
            {
                "action": "full",
                "reason": "site policy: correct",
                "rule": "a",
                "site": "north",
                "warnings": [],
            },
            summary(4.25, 40.0),
            ["far off isocenter (40 mm)", "decided by default"],
            None,
            "coil-ab.html",
        ),
        DatasetEntry(
            "sub-03/anat/sub-03_T1w.nii.gz",
            {"action": "skip", "reason": "3D", "rule": "b", "site": "south", "warnings": []},
            None,
            [],
        ),
    ]
    html = render_dataset_page(entries, title="study")
    page = parse(html)
    check_self_contained(page, html)
    check_png(page.images["fig-dataset"])
    cells = page.cells("decisions")
    for i, e in enumerate(entries):
        assert exact(cells[f"image.{i}"]) == e.relpath
        assert exact(cells[f"action.{i}"]) == e.decision["action"]
        assert exact(cells[f"flags.{i}"]) == e.flags
    assert exact(cells["displacement_max_mm.1"]) == 4.25 and cells["displacement_max_mm.2"]["text"] == "n/a"
    assert "sub-01_T1w.html" in page.urls and "coil-ab.html" in page.urls
