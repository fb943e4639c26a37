"""Write report pages from files: an image and its warp products, a derivatives dataset, a coil model.

Pages are written complete-or-nothing (:class:`~nl_unwarp.io.atomic.OutputSet`).
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping
from dataclasses import asdict
from pathlib import Path

import numpy as np

from ..io.atomic import OutputSet
from .pages import (
    DatasetEntry,
    ImageInputs,
    coil_page_name,
    render_coil_page,
    render_dataset_page,
    render_image_page,
)
from .stats import fov_centre_ras_mm, image_flags

__all__ = [
    "REPORTS_DIR",
    "image_report_name",
    "read_index_record",
    "write_coil_page",
    "write_correction_report",
    "write_dataset_report",
    "write_image_report",
    "write_page",
]

#: Folder of the reports inside a derivatives dataset.
REPORTS_DIR = "reports"
INDEX_NAME = "index.html"


def write_page(path: str | Path, text: str) -> Path:
    """Write an HTML page atomically."""
    path = Path(path)
    with OutputSet() as out:
        out.reserve(path).write_text(text, encoding="utf-8")
    return path


def image_report_name(source_relpath: str) -> str:
    """Report file name of an image (``sub-01/anat/sub-01_T1w.nii.gz`` -> ``sub-01_T1w.html``)."""
    return Path(source_relpath).name.split(".")[0] + ".html"


def _field_on_grid(field_file: str | Path, shape, affine: np.ndarray) -> np.ndarray:
    """The ITK field's RAS displacement on an image grid (a field with a margin is sampled linearly)."""
    from ..io.itk import read_itk_field

    disp, field_affine = read_itk_field(field_file)
    if disp.shape[:3] == tuple(shape[:3]) and np.allclose(field_affine, affine, atol=1e-4):
        return disp
    from scipy.ndimage import map_coordinates

    from ..warp import index_to_ras

    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape[:3]], indexing="ij"), -1).astype(float)
    inv = np.linalg.inv(field_affine)
    coords = index_to_ras(inv, index_to_ras(affine, ijk))
    return np.stack(
        [
            map_coordinates(disp[..., c], np.moveaxis(coords, -1, 0), order=1, mode="nearest")
            for c in range(3)
        ],
        -1,
    ).astype(np.float32)


def _load(path) -> tuple[np.ndarray, np.ndarray]:
    from ..io.nifti import load_image

    img = load_image(path)
    return img.data, img.affine


#: Files read at once: inflating gzip releases the GIL, so reading the
#: images in threads uses the cores there are (a report reads four or five).
READ_THREADS = 4


def _read_all(paths: Mapping[str, str | Path | None]) -> dict:
    """Each given file's (data, affine), read in threads; None for a missing one."""
    from concurrent.futures import ThreadPoolExecutor

    given = {k: v for k, v in paths.items() if v is not None}
    workers = max(1, min(READ_THREADS, len(given), os.cpu_count() or 1))
    with ThreadPoolExecutor(workers) as pool:
        futures = {k: pool.submit(_load, v) for k, v in given.items()}
        return {k: futures[k].result() if k in futures else None for k in paths}


def _is_2d(summary: Mapping, metadata: Mapping | None) -> bool:
    return (
        summary.get("mode") in ("inplane", "throughplane")
        or (metadata or {}).get("MRAcquisitionType") == "2D"
    )


def _coil_maps(coil_file, summary: Mapping, affine: np.ndarray):
    """Functions from voxel indices to the RAS displacement (mm) and the Jacobian determinant, from the coil.

    As :mod:`nl_unwarp.warp` computes them for a full correction, evaluated
    exactly (no lattice) where they are asked for. None unless the coil file is
    the one the summary names (same SHA-256) and the mode is ``full`` (the
    others project the displacement).
    """
    from ..frames import DeviceFrame
    from ..io.coilfile import coil_sha256, load_coil
    from ..warp import index_to_ras

    if coil_file is None or summary.get("mode", "full") != "full":
        return None
    if coil_sha256(coil_file) != summary["coil_model"].get("sha256"):
        return None
    coil = load_coil(coil_file)
    frame = DeviceFrame(summary["patient_position"], summary["isocenter_offset_mm"])
    affine = np.asarray(affine, float)

    def device(ijk: np.ndarray) -> np.ndarray:
        return frame.to_device(index_to_ras(affine, np.asarray(ijk, float)))

    def disp_at(ijk: np.ndarray) -> np.ndarray:
        # d_ras = Q (u(r) - r), r the voxel's device position.
        r_dev = device(ijk)
        return frame.vectors_to_ras(coil.displacement(r_dev)).astype(np.float32)

    def jac_at(ijk: np.ndarray) -> np.ndarray:
        # det(Q J Q^T) = det(J): a rotation keeps the determinant.
        _, jac = coil.encode(device(ijk))
        return np.linalg.det(jac).astype(np.float32)

    return disp_at, jac_at


def write_image_report(
    out_html: str | Path,
    *,
    raw_file: str | Path,
    summary: Mapping | str | Path,
    field_file: str | Path,
    jacobian_file: str | Path | None = None,
    corrected_file: str | Path | None = None,
    magnitude_file: str | Path | None = None,
    coil_file: str | Path | None = None,
    diffusion_summary: Mapping | str | Path | None = None,
    decision: Mapping | None = None,
    metadata: Mapping | None = None,
    title: str | None = None,
    coil_page_href: str | None = None,
) -> Path:
    """Write the per-image page from an image and its warp products.

    Parameters
    ----------
    out_html : path
    raw_file : path
        The image as the scanner reconstructed it.
    summary : mapping or path
        Warp summary (or its JSON file).
    field_file : path
        ITK displacement field (its grid may extend beyond the image's).
    jacobian_file : path, optional
        Jacobian map on the image grid; without it, the page shows the
        determinant of the field's finite-difference Jacobian (less exact).
    corrected_file : path, optional
        The corrected image, for the before/after comparison.
    magnitude_file, coil_file : path, optional
        The displacement magnitude map (on the image grid) and the coil model
        file. With both, a full (3D) correction and the coil the summary names
        (same SHA-256), neither the field nor the Jacobian map is read: the
        displacement statistics and map come from the magnitude map, the
        Jacobian range from the summary, and the grid overlay's in-plane
        displacement and the Jacobian map's three planes are evaluated from
        the coil model on the shown pixels only (they differ from the files by
        at most the summary's ``interpolation_error_mm`` and
        ``jacobian_interpolation_error``, the lattice's). Inflating the gzip
        files is most of the time of a report, the three-component field
        above all.
    diffusion_summary : mapping or path, optional
        A DWI's weighting summary (or its JSON file; from
        :class:`~nl_unwarp.interfaces.diffusion.DiffusionWeighting`): the page
        shows its b-value deviation per shell.
    decision, metadata : mapping, optional
        Decision record and the sidecar it read.
    title : str, optional
        Default: the raw file's name.
    coil_page_href : str, optional
        Link to the coil model page (default: ``coil-<sha>.html`` beside the page).
    """
    if not isinstance(summary, Mapping):
        summary = json.loads(Path(summary).read_text(encoding="utf-8"))
    if diffusion_summary is not None:
        if not isinstance(diffusion_summary, Mapping):
            diffusion_summary = json.loads(Path(diffusion_summary).read_text(encoding="utf-8"))
        summary = {**summary, "diffusion": dict(diffusion_summary)}
    maps = None
    if magnitude_file is not None and not _is_2d(summary, metadata):
        maps = _coil_maps(coil_file, summary, _header_affine(raw_file))
    files = {
        "raw": raw_file,
        "corrected": corrected_file,
        "magnitude": magnitude_file if maps is not None else None,
        "jacobian": jacobian_file if maps is None else None,
    }
    read = _read_all(files)
    raw, affine = read["raw"]
    magnitude, jac_range = None, None
    if maps is not None:
        magnitude, mag_affine = read["magnitude"]
        if magnitude.shape[:3] == raw.shape[:3] and np.allclose(mag_affine, affine, atol=1e-4):
            disp, jac = maps
            jac_range = (summary["jacobian_min"], summary["jacobian_max"])
        else:  # not on the image grid: read the field and the Jacobian map
            maps, magnitude = None, None
            if jacobian_file is not None:
                read["jacobian"] = _load(jacobian_file)
    if maps is None:
        disp = _field_on_grid(field_file, raw.shape, affine)
        if jacobian_file is not None:
            jac = np.asarray(read["jacobian"][0], dtype=np.float32)
        else:
            jac = _finite_difference_jacobian(disp, affine)
    corrected = read["corrected"][0] if corrected_file is not None else None
    href = coil_page_href or coil_page_name(summary["coil_model"].get("sha256"))
    inputs = ImageInputs(
        title or Path(raw_file).name,
        raw,
        affine,
        dict(summary),
        disp,
        jac,
        corrected,
        dict(decision) if decision else None,
        dict(metadata) if metadata else None,
        href,
        magnitude_mm=magnitude,
        jacobian_range=jac_range,
    )
    return write_page(out_html, render_image_page(inputs))


def _header_affine(path: str | Path) -> np.ndarray:
    """A NIfTI file's affine, from its header only."""
    import nibabel as nib

    return np.asarray(nib.load(str(path)).affine, float)


def _finite_difference_jacobian(disp: np.ndarray, affine: np.ndarray) -> np.ndarray:
    """det(I + dd/dp) by central differences on the grid (``numpy.gradient``)."""
    a3 = np.asarray(affine, float)[:3, :3]
    inv = np.linalg.inv(a3)
    grads = np.stack(
        [
            np.stack(
                np.gradient(disp[..., c], axis=(0, 1, 2))
                if min(disp.shape[:3]) > 1
                else [np.zeros(disp.shape[:3])] * 3,
                -1,
            )
            for c in range(3)
        ],
        -2,
    )
    # d d_c / d p = (d d_c / d ijk) inv(A)
    jac = np.eye(3) + grads @ inv
    return np.linalg.det(jac).astype(np.float32)


def write_coil_page(coil_file: str | Path, out_html: str | Path) -> Path:
    """Write a coil model's page."""
    from ..io.coilfile import coil_sha256, load_coil

    return write_page(out_html, render_coil_page(load_coil(coil_file), coil_sha256(coil_file)))


def _provenance(output_dir: Path, relpath: str) -> dict | None:
    from ..bids.names import derivative_name

    for kind in ("field", "corrected"):
        sidecar = output_dir / derivative_name(relpath, kind, ext=".json")
        if sidecar.exists():
            return json.loads(sidecar.read_text(encoding="utf-8")).get("NLUnwarpProvenance")
    return None


def _fov_centre(path: str | Path):
    import nibabel as nib

    img = nib.load(str(path))
    return fov_centre_ras_mm(img.shape[:3], img.affine)


#: The index page's entries, machine-readable, beside it: runs into one output folder (one
#: cluster job per participant) merge theirs into it, and the page is drawn from all of them.
INDEX_RECORD = "index.json"
INDEX_FORMAT = "nl_unwarp dataset index 1"


def _plan_entries(output_dir: Path, plan) -> tuple[list[DatasetEntry], dict[str, str]]:
    """The index entries of a plan's images (without page links), and the coil pages they use."""
    from ..io.coilfile import coil_sha256

    entries, coils = [], {}
    for row in plan.rows:
        decision = row.decision.as_record() if row.decision else None
        prov = _provenance(output_dir, row.relpath)
        summary = None
        if prov is not None:
            summary = {**prov["warp"], "coil_model": prov["coil_model"]}
        coil_href = None
        if row.decision is not None and Path(row.decision.coil_path).is_file():
            sha = coil_sha256(row.decision.coil_path)
            coil_href = coil_page_name(sha)
            coils.setdefault(coil_href, row.decision.coil_path)
        flags = (
            []
            if decision is None
            else image_flags(summary=summary, decision=decision, fov_centre_ras_mm=_fov_centre(row.path))
        )
        entries.append(DatasetEntry(row.relpath, decision, summary, flags, None, coil_href, row.problem))
    return entries, coils


def _entry_record(entry: DatasetEntry) -> dict:
    """An entry as JSON values (tuples become lists), without its page link (found at drawing)."""
    record = json.loads(json.dumps(asdict(entry)))
    record.pop("report_href")
    return record


def read_index_record(reports: Path) -> dict[str, dict]:
    """The entries of ``reports/index.json`` by image path (empty if there is none).

    Raises
    ------
    InputError
        The file is not one of ours.
    """
    from ..errors import InputError

    path = reports / INDEX_RECORD
    if not path.exists():
        return {}
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except ValueError:
        doc = None
    if not isinstance(doc, dict) or doc.get("format") != INDEX_FORMAT or not isinstance(
            doc.get("images"), list):
        raise InputError(str(path), f"not an nl_unwarp index record (format {INDEX_FORMAT!r}); "
                                    "move the file away")
    return {record["relpath"]: record for record in doc["images"]}


def write_dataset_report(output_dir: str | Path, plan) -> Path:
    """Write ``reports/index.html`` of a derivatives dataset and one page per coil model used.

    The page lists this plan's images and those that earlier runs into the same folder
    recorded in ``reports/index.json``: this plan's entries replace theirs, the others are
    kept, all sorted by image path, so the page does not depend on the order of the runs.
    Hold the folder's lock (:func:`nl_unwarp.io.lock.folder_lock`) around the call: it
    reads, merges and writes.

    Parameters
    ----------
    output_dir : path
        Root of the derivatives dataset (its per-image reports, if any, are in
        ``reports/``).
    plan : nl_unwarp.bids.plan.Plan
        The plan the run was made from.

    Returns
    -------
    Path
        The index page.
    """
    from ..io.coilfile import coil_sha256, load_coil

    output_dir = Path(output_dir)
    reports = output_dir / REPORTS_DIR
    entries, coils = _plan_entries(output_dir, plan)
    records = read_index_record(reports)
    records.update({e.relpath: _entry_record(e) for e in entries})
    merged = []
    for relpath in sorted(records):
        page_name = image_report_name(relpath)
        merged.append(DatasetEntry(**records[relpath],
                                   report_href=page_name if (reports / page_name).exists() else None))
    with OutputSet() as out:
        for href, path in coils.items():
            out.reserve(reports / href).write_text(
                render_coil_page(load_coil(path), coil_sha256(path)), encoding="utf-8"
            )
        record = {"format": INDEX_FORMAT, "images": [records[k] for k in sorted(records)]}
        out.reserve(reports / INDEX_RECORD).write_text(
            json.dumps(record, indent=1, sort_keys=True) + "\n", encoding="utf-8")
        index = reports / INDEX_NAME
        out.reserve(index).write_text(
            render_dataset_page(merged, title=Path(plan.bids_dir).name), encoding="utf-8"
        )
    return index


def write_correction_report(
    out_html: str | Path,
    *,
    raw_file: str | Path,
    summary: Mapping | str | Path,
    field_file: str | Path,
    jacobian_file: str | Path | None = None,
    corrected_file: str | Path | None = None,
    coil_file: str | Path | None = None,
    magnitude_file: str | Path | None = None,
) -> list[Path]:
    """The page of one correction, and its coil model's page beside it (when the coil file is given).

    Returns
    -------
    list of Path
        The image page, then the coil model page (if written).
    """
    if not isinstance(summary, Mapping):
        summary = json.loads(Path(summary).read_text(encoding="utf-8"))
    out_html = Path(out_html)
    pages = [
        write_image_report(
            out_html,
            raw_file=raw_file,
            summary=summary,
            field_file=field_file,
            jacobian_file=jacobian_file,
            corrected_file=corrected_file,
            magnitude_file=magnitude_file,
            coil_file=coil_file,
        )
    ]
    coil_name = coil_page_name(summary["coil_model"].get("sha256"))
    if coil_file is not None and coil_name:
        pages.append(write_coil_page(coil_file, out_html.parent / coil_name))
    return pages
