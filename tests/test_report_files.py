"""Reports from files: the nipype interface, the CLI, the BIDS run, and a headless browser."""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest
from bidsgen import DWI, MOVED_T1W, T2W_2D, configure_nipype, make_study
from test_report import FLOAT32_RTOL, SHOWN_MM_TOL, check_png, check_self_contained, exact, parse, shown

from nl_unwarp.api import FrameSpec, WarpOutputs, correct_file
from nl_unwarp.bids.names import derivative_name
from nl_unwarp.cli import main
from nl_unwarp.demo import demo_coil_path
from nl_unwarp.io.atomic import OutputSet
from nl_unwarp.io.coilfile import coil_sha256
from nl_unwarp.io.nifti import write_image

SHAPE, VOXEL_MM = (32, 32, 24), 6.0
#: Percentages are shown with 3 decimals: half a unit in the last place.
SHOWN_PCT_TOL = 0.5e-3 + 1e-12
#: A Jacobian determinant near 1 stored as float32: a few float32 epsilons (1.2e-7).
JAC_FLOAT32_TOL = 1e-6
#: Browser screenshot size (pixels); the page must lay out in it.
WINDOW = (1280, 2400)
#: Seconds a headless browser may take to render one local page (2 shared cores).
BROWSER_TIMEOUT_S = 120


@pytest.fixture
def corrected(tmp_path):
    """A small sphere image corrected with the demo coil, with all warp products."""
    affine = np.diag([VOXEL_MM] * 3 + [1.0])
    affine[:3, 3] = -VOXEL_MM * (np.asarray(SHAPE) - 1) / 2
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in SHAPE], indexing="ij"), -1)
    raw = (np.linalg.norm(ijk - (np.asarray(SHAPE) - 1) / 2, axis=-1) < 10).astype(np.float32) * 100
    with OutputSet() as out:
        write_image(out, tmp_path / "raw.nii.gz", raw, affine)
    paths = {k: tmp_path / f"{k}.nii.gz" for k in ("field", "jacobian", "magnitude")}
    summary = correct_file(
        tmp_path / "raw.nii.gz",
        demo_coil_path(),
        tmp_path / "corrected.nii.gz",
        warp_outputs=WarpOutputs(**paths, summary=tmp_path / "summary.json"),
        frame=FrameSpec("HFS", isocenter_offset_mm=(0.0, 0.0, 30.0)),
    )
    return tmp_path, summary


def test_interface_writes_the_page_and_the_sink_puts_it_in_place(corrected, tmp_path):
    from nipype.pipeline import engine as pe

    from nl_unwarp.interfaces.report import ImageReport, SinkReport

    folder, summary = corrected
    wf = pe.Workflow(name="report_wf", base_dir=str(tmp_path / "work"))
    report = pe.Node(
        ImageReport(
            in_file=str(folder / "raw.nii.gz"),
            summary=str(folder / "summary.json"),
            field=str(folder / "field.nii.gz"),
            jacobian=str(folder / "jacobian.nii.gz"),
            corrected=str(folder / "corrected.nii.gz"),
            title="raw image",
        ),
        name="report",
    )
    target = tmp_path / "out" / "reports" / "raw.html"
    put = pe.Node(SinkReport(out_path=str(target)), name="put")
    wf.connect(report, "out_report", put, "in_report")
    wf.run(plugin="Linear")
    html = target.read_text(encoding="utf-8")
    page = parse(html)
    check_self_contained(page, html)
    for fig in ("fig-magnitude", "fig-before", "fig-after", "fig-jacobian"):
        check_png(page.images[fig])
    assert exact(page.cells("identity")["coil_sha256"]) == summary["coil_model"]["sha256"]
    assert exact(page.cells("warp")["jacobian_max"]) == summary["jacobian_max"]
    # A re-run restores a removed page from the cache (the sink always runs).
    target.unlink()
    wf.run(plugin="Linear")
    assert target.read_text(encoding="utf-8") == html


def test_page_without_the_field_file_shows_the_same_numbers_and_planes(corrected, tmp_path):
    """Magnitude map + coil file: the field and Jacobian files are not read, the page is the same."""
    import SimpleITK as sitk

    from nl_unwarp.compose import margin_slices
    from nl_unwarp.io.nifti import load_image
    from nl_unwarp.report.figures import orthogonal_planes
    from nl_unwarp.report.files import _coil_maps, write_image_report

    folder, summary = corrected
    common = {
        "raw_file": folder / "raw.nii.gz",
        "summary": summary,
        "field_file": folder / "field.nii.gz",
        "jacobian_file": folder / "jacobian.nii.gz",
        "corrected_file": folder / "corrected.nii.gz",
    }
    write_image_report(tmp_path / "field.html", **common)
    # A field file that is not a field: the page must not read it.
    (tmp_path / "not-a-field.nii.gz").write_bytes(b"not read")
    not_read = tmp_path / "not-a-field.nii.gz"
    fast = dict(common, field_file=not_read, jacobian_file=not_read)
    write_image_report(
        tmp_path / "fast.html", **fast, magnitude_file=folder / "magnitude.nii.gz", coil_file=demo_coil_path()
    )
    slow, quick = (parse((tmp_path / f"{n}.html").read_text(encoding="utf-8")) for n in ("field", "fast"))
    for table_id in ("displacement", "warp", "identity"):
        got, want = quick.cells(table_id), slow.cells(table_id)
        assert got.keys() == want.keys()
        for key, cell in want.items():
            if cell["value"] is None:
                assert got[key]["text"] == cell["text"], key
            elif isinstance(exact(cell), float):
                # The pipeline's magnitude map against |field| computed here, both float32.
                assert exact(got[key]) == pytest.approx(exact(cell), rel=FLOAT32_RTOL), key
            else:
                assert exact(got[key]) == exact(cell), key
    for fig in ("fig-magnitude", "fig-before", "fig-after", "fig-jacobian"):
        check_png(quick.images[fig])
    # The coil-model values on the shown planes equal the field file as SimpleITK reads it (LPS
    # vectors, ITK convention: RAS = LPS with x and y negated), within the warp lattice's error.
    raw = load_image(folder / "raw.nii.gz")
    disp_at, jac_at = _coil_maps(demo_coil_path(), summary, raw.affine)
    field_lps = sitk.GetArrayFromImage(sitk.ReadImage(str(folder / "field.nii.gz"))).transpose(2, 1, 0, 3)
    field_ras = field_lps * np.array([-1.0, -1.0, 1.0])
    # The field file extends beyond the image by a margin (the default): its interior is the image grid.
    field_ras = field_ras[margin_slices(raw.data.shape, field_ras.shape[:3])]
    jac_file = np.asarray(load_image(folder / "jacobian.nii.gz").data)
    for plane in orthogonal_planes(raw.data.shape, raw.affine):
        got = plane.values(disp_at, raw.data.shape)
        assert np.abs(got - plane.take(field_ras)).max() <= summary["interpolation_error_mm"] + SHOWN_MM_TOL
        got_jac = plane.values(jac_at, raw.data.shape)
        assert np.abs(got_jac - plane.take(jac_file)).max() <= (
            summary["jacobian_interpolation_error"] + JAC_FLOAT32_TOL
        )
    # Another coil's file (a different SHA-256) is not used: the page reads the field again.
    assert _coil_maps(folder / "summary.json", summary, raw.affine) is None


def test_correct_with_report_prints_where_it_is(corrected, tmp_path, capsys):
    folder, _ = corrected
    out = tmp_path / "cli" / "sub-01.html"
    code = main(
        [
            "--quiet",
            "correct",
            str(folder / "raw.nii.gz"),
            str(tmp_path / "c.nii.gz"),
            "--coil",
            str(demo_coil_path()),
            "--report",
            str(out),
        ]
    )
    assert code == 0
    printed = capsys.readouterr().out
    sha = coil_sha256(demo_coil_path())
    assert f"report           {out} (coil model page coil-{sha[:12]}.html)" in printed
    page = parse(out.read_text(encoding="utf-8"))
    assert f"coil-{sha[:12]}.html" in page.urls and (out.parent / f"coil-{sha[:12]}.html").is_file()
    # The scratch field and Jacobian map are gone; only the asked-for files remain.
    assert sorted(p.name for p in out.parent.iterdir()) == sorted([out.name, f"coil-{sha[:12]}.html"])


def test_report_subcommand_coil_and_image(corrected, tmp_path, capsys):
    folder, summary = corrected
    assert main(["--quiet", "report", "coil", str(demo_coil_path()), "--out", str(tmp_path / "c.html")]) == 0
    assert f"report           {tmp_path / 'c.html'}" in capsys.readouterr().out
    assert (
        main(
            [
                "--quiet",
                "report",
                "image",
                str(folder / "raw.nii.gz"),
                "--summary",
                str(folder / "summary.json"),
                "--field",
                str(folder / "field.nii.gz"),
                "--out",
                str(tmp_path / "i.html"),
            ]
        )
        == 0
    )
    page = parse((tmp_path / "i.html").read_text(encoding="utf-8"))
    # Without the Jacobian map the page derives it from the field by finite differences.
    jac = page.cells("warp")
    assert exact(jac["jacobian_min"]) == summary["jacobian_min"]
    assert "fig-after" not in page.images


def test_bids_run_writes_per_image_pages_and_the_index(tmp_path, monkeypatch):
    from nl_unwarp.bids.app import RunOptions, run

    configure_nipype(tmp_path)
    study = make_study(tmp_path, monkeypatch, subjects_per_site=1)
    out = tmp_path / "derivatives"
    rows, failures = run(
        RunOptions(
            bids_dir=study.root,
            output_dir=out,
            site_config=study.site_config,
            work_dir=tmp_path / "work",
            plugin="Linear",
            participants=["01"],
        )
    )
    assert failures == []
    reports = out / "reports"
    index = (reports / "index.html").read_text(encoding="utf-8")
    page = parse(index)
    check_self_contained(page, index)
    check_png(page.images["fig-dataset"])
    cells = page.cells("decisions")
    by_image = {exact(cells[f"image.{i}"]): i for i in range(len(rows))}
    for row in rows:
        i = by_image[row["image"]]
        if row["done"]:
            # The index shows the maximum of the provenance JSON the run wrote.
            prov = json.loads((out / derivative_name(row["image"], "field", ext=".json")).read_text())
            assert (
                exact(cells[f"displacement_max_mm.{i}"])
                == prov["NLUnwarpProvenance"]["warp"]["displacement_max_mm"]
            )
        report = reports / (Path(row["image"]).name.split(".")[0] + ".html")
        assert report.is_file() and report.name in page.urls
    # sub-01 ses-2: the table was moved 40 mm (demodata.MOVED_TABLE_MM).
    assert exact(cells[f"flags.{by_image[MOVED_T1W]}"]) == ["far off isocenter (40 mm)"]
    t2 = parse((reports / (Path(T2W_2D).name.split(".")[0] + ".html")).read_text(encoding="utf-8"))
    check_png(t2.images["fig-slices"])
    # The DWI's page shows the b-value deviation per shell of the weighting summary the run wrote
    # (the b-deviation map's sidecar carries it, NLUnwarpShells).
    sidecar = json.loads((out / derivative_name(DWI, "bdeviation", ext=".json")).read_text())
    want = sidecar["NLUnwarpShells"]
    dwi = parse((reports / (Path(DWI).name.split(".")[0] + ".html")).read_text(encoding="utf-8"))
    shells = dwi.cells("shells")
    assert len(want) >= 1 and f"bval.{len(want)}" not in shells
    for i, shell in enumerate(want):
        assert exact(shells[f"bval.{i}"]) == shell["bval"]
        for key in ("median_deviation", "min_deviation", "max_deviation"):
            assert exact(shells[f"{key}_percent.{i}"]) == shell[key]
            assert shown(shells[f"{key}_percent.{i}"]) == pytest.approx(100 * shell[key], abs=SHOWN_PCT_TOL)
    # No shells on an anatomical page.
    assert "shells" not in t2.tables
    for sha_page in {u for u in page.urls if u.startswith("coil-")}:
        check_png(parse((reports / sha_page).read_text(encoding="utf-8")).images["fig-coil"])
    assert "reports/" in (out / ".bidsignore").read_text()


def _chromium() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(_chromium() is None, reason="Debian's chromium is not installed")
def test_page_renders_in_headless_chromium(corrected, tmp_path):
    from nl_unwarp.report.files import write_correction_report

    folder, summary = corrected
    page = write_correction_report(
        tmp_path / "page.html",
        raw_file=folder / "raw.nii.gz",
        summary=summary,
        field_file=folder / "field.nii.gz",
        jacobian_file=folder / "jacobian.nii.gz",
        corrected_file=folder / "corrected.nii.gz",
    )[0]
    shot = tmp_path / "shot.png"
    # Flags that keep a headless browser off the network and out of the user's profile.
    cmd = [
        _chromium(),
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={tmp_path / 'profile'}",
        f"--window-size={WINDOW[0]},{WINDOW[1]}",
        f"--screenshot={shot}",
        page.resolve().as_uri(),
    ]
    subprocess.run(cmd, check=True, capture_output=True, timeout=BROWSER_TIMEOUT_S)
    pixels = matplotlib.image.imread(str(shot))
    assert pixels.shape[:2] == (WINDOW[1], WINDOW[0])
    # The page drew something: the grey background, white tables, dark text and the figures.
    top = pixels[: WINDOW[1] // 2, :, :3]
    assert float(top.std()) > 0.05
    assert len(np.unique((top * 15).round().reshape(-1, 3), axis=0)) > 50
