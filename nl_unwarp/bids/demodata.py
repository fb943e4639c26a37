"""A small invented multi-site BIDS dataset, for the demo, the tests and the benchmarks.

Everything here is fictional: the sites *Northfield* and *Southbay*, the
manufacturer *Fictive Magnetics*, its scanners *Meridian 45* and *Halyard 60*
(the demo coil models ``demo_coil.json`` and ``demo_coil_b.json``), the
ImageType tokens that mean "corrected by the scanner", and the subjects.

Each session has a 3D T1w, a 2D multi-slice T2w that the scanner corrected
in-plane, a bold run with events and a short dwi series with bval/bvec. At
Southbay the scanner corrected the T1w in 3D (so it is skipped). One session,
``sub-01/ses-2``, has the table moved off the isocenter.
"""

from __future__ import annotations

import json
import shutil
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

import numpy as np

__all__ = ["SITES", "DemoSite", "make_dataset", "write_coils", "write_site_config"]

#: Environment variable that the demo site configuration reads coil paths from.
COIL_DIR_VARIABLE = "NLU_COIL_DIR"
VOXEL_MM = 8.0
SHAPE_3D = (24, 24, 24)
#: 2D multi-slice grid: 8 mm in-plane, 12 mm slices (thick: the policy warns).
SHAPE_2D, SLICE_MM = (24, 24, 14), 12.0
SHAPE_BOLD = (24, 24, 16)
BOLD_VOLUMES, DWI_VOLUMES = 3, 3
#: Table moved toward the feet of a head-first-supine patient for sub-01 ses-2, mm.
MOVED_TABLE_MM = (0.0, 0.0, -40.0)


@dataclass(frozen=True)
class DemoSite:
    """A fictional site with one fictional scanner."""

    name: str
    coil_file: str
    identity: dict
    tokens_2d: tuple[str, ...]
    tokens_3d: tuple[str, ...]
    t1w_corrected_3d: bool


SITES = (
    DemoSite("northfield", "demo_coil.json",
             {"Manufacturer": "Fictive Magnetics", "ManufacturersModelName": "Meridian 45",
              "GradientSetType": "MX45", "DeviceSerialNumber": "NF-0001",
              "StationName": "NORTHFIELD-MR1", "SoftwareVersions": "fx 4.2"},
             ("PLANEFIX",), ("VOLFIX",), False),
    DemoSite("southbay", "demo_coil_b.json",
             {"Manufacturer": "Fictive Magnetics", "ManufacturersModelName": "Halyard 60",
              "GradientSetType": "HY60", "DeviceSerialNumber": "SB-0042",
              "StationName": "SOUTHBAY-MR2", "SoftwareVersions": ["fx 5.0", "recon 2.1"]},
             ("SLICEFIX",), ("BLOCKFIX",), True),
)


def write_coils(coil_dir: str | Path) -> dict[str, Path]:
    """Copy the fictional demo coil models into a folder (outside the dataset)."""
    coil_dir = Path(coil_dir)
    coil_dir.mkdir(parents=True, exist_ok=True)
    out = {}
    for site in SITES:
        src = Path(str(resources.files("nl_unwarp") / "data" / site.coil_file))
        out[site.name] = Path(shutil.copyfile(src, coil_dir / site.coil_file))
    return out


def site_config_document() -> dict:
    """The demo site configuration (format ``nl_unwarp-site`` 1)."""
    return {
        "format": "nl_unwarp-site",
        "format_version": 1,
        "description": "FICTIONAL sites and scanners of the nl_unwarp demo.",
        "coil_models": {site.name: {"path": f"${{{COIL_DIR_VARIABLE}}}/{site.coil_file}"}
                        for site in SITES},
        "policy": {"flag_absent": "correct", "missing_table_position": "warn", "thick_slice_mm": 10.0},
        "sites": {site.name: {"policy": {"corrected_2d_tokens": list(site.tokens_2d),
                                         "corrected_3d_tokens": list(site.tokens_3d)}}
                  for site in SITES},
        "scanners": [
            # Any Fictive Magnetics scanner: the Northfield coil, unless a more specific rule matches.
            {"name": "fictive-any", "site": "northfield", "coil_model": "northfield",
             "match": {"manufacturer": "Fictive Magnetics"}},
            {"name": "southbay-halyard", "site": "southbay", "coil_model": "southbay",
             "match": {"manufacturer": "Fictive Magnetics", "model": "Halyard 60",
                       "gradient_set": "HY60"}},
        ],
    }


def write_site_config(path: str | Path) -> Path:
    """Write the demo site configuration."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(site_config_document(), indent=2) + "\n", encoding="utf-8")
    return path


def _affine(shape, zooms) -> np.ndarray:
    affine = np.diag(list(zooms) + [1.0])
    affine[:3, 3] = -np.asarray(zooms) * (np.asarray(shape) - 1) / 2
    return affine


def _image(shape, zooms, *, coil_file: str | None, table_mm, throughplane_only: bool) -> tuple:
    """Phantom image as the scanner would reconstruct it, and its affine."""
    from ..frames import DeviceFrame, offset_from_table_position
    from ..io.coilfile import load_coil
    from ..phantom import Phantom, forward_simulate
    from ..warp import default_slice_axis, slice_normal_ras

    affine = _affine(shape, zooms)
    phantom = Phantom(radius_mm=80.0, marker_spacing_mm=40.0, marker_radius_mm=10.0,
                      marker_extent_mm=60.0, edge_mm=4.0)
    if coil_file is None:
        return _truth(phantom, shape, affine), affine
    coil = load_coil(Path(str(resources.files("nl_unwarp") / "data" / coil_file)))
    frame = DeviceFrame("HFS", offset_from_table_position(table_mm) if table_mm else (0, 0, 0))
    normal = frame.device_from_ras @ slice_normal_ras(affine, default_slice_axis(affine))

    def encode(r):
        u = coil.encode(r, jacobian=False)[0]
        # The scanner has corrected in-plane: only the through-plane part is left.
        return r + np.outer((u - r) @ normal, normal) if throughplane_only else u

    data = forward_simulate(phantom, encode, shape, affine, frame)
    return data.astype(np.float32), affine


def _truth(phantom, shape, affine) -> np.ndarray:
    from ..warp import index_to_ras

    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1).astype(float)
    return phantom.intensity(index_to_ras(affine, ijk)).astype(np.float32)


def _save(path: Path, data: np.ndarray, affine: np.ndarray, sidecar: dict | None) -> None:
    import nibabel as nib

    path.parent.mkdir(parents=True, exist_ok=True)
    img = nib.Nifti1Image(data, affine)
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    nib.save(img, str(path))
    if sidecar is not None:
        path.with_name(path.name.replace(".nii.gz", ".json")).write_text(
            json.dumps(sidecar, indent=2) + "\n", encoding="utf-8")


def _session(root: Path, sub: str, ses: str, site: DemoSite, table_mm, simulate: bool) -> None:
    base = root / f"sub-{sub}" / f"ses-{ses}"
    stem = f"sub-{sub}_ses-{ses}"
    common = dict(site.identity, PatientPosition="HFS")
    if table_mm is not None:
        common["TablePosition"] = list(table_mm)
    coil = site.coil_file if simulate else None

    t1_tokens = ["ORIGINAL", "PRIMARY", "M"] + (list(site.tokens_3d) if site.t1w_corrected_3d else [])
    data, aff = _image(SHAPE_3D, (VOXEL_MM,) * 3, coil_file=None if site.t1w_corrected_3d else coil,
                       table_mm=table_mm, throughplane_only=False)
    t1 = dict(common, MRAcquisitionType="3D", ImageType=t1_tokens)
    if not site.t1w_corrected_3d:
        t1["NonlinearGradientCorrection"] = False
    _save(base / "anat" / f"{stem}_T1w.nii.gz", data, aff, t1)

    data, aff = _image(SHAPE_2D, (VOXEL_MM, VOXEL_MM, SLICE_MM), coil_file=coil, table_mm=table_mm,
                       throughplane_only=True)
    t2 = dict(common, MRAcquisitionType="2D", ImageType=["ORIGINAL", "PRIMARY", "M", *site.tokens_2d])
    if site.name == "southbay":
        t2["NonlinearGradientCorrection"] = True
    _save(base / "anat" / f"{stem}_acq-2d_T2w.nii.gz", data, aff, t2)

    vol, aff = _image(SHAPE_BOLD, (VOXEL_MM,) * 3, coil_file=coil, table_mm=table_mm,
                      throughplane_only=False)
    series = np.stack([vol * (1 + 0.01 * t) for t in range(BOLD_VOLUMES)], -1)
    # The scanner's own flag is absent: the site policy decides (MRAcquisitionType 2D, EPI).
    _save(base / "func" / f"{stem}_task-rest_bold.nii.gz", series, aff,
          dict(common, MRAcquisitionType="2D", ImageType=["ORIGINAL", "PRIMARY", "M"]))
    (base / "func" / f"{stem}_task-rest_events.tsv").write_text(
        "onset\tduration\ttrial_type\n0.0\t2.0\trest\n2.0\t2.0\ttap\n", encoding="utf-8")

    dwi = np.stack([vol * np.exp(-b / 3000) for b in (0, 1000, 1000)], -1).astype(np.float32)
    _save(base / "dwi" / f"{stem}_dwi.nii.gz", dwi, aff,
          dict(common, MRAcquisitionType="2D", NonlinearGradientCorrection=False))
    (base / "dwi" / f"{stem}_dwi.bval").write_text("0 1000 1000\n", encoding="utf-8")
    (base / "dwi" / f"{stem}_dwi.bvec").write_text("0 1 0\n0 0 1\n0 0 0\n", encoding="utf-8")


def make_dataset(root: str | Path, *, subjects_per_site: int = 2, simulate: bool = True,
                 moved_table: bool = True) -> Path:
    """Write the invented dataset.

    Parameters
    ----------
    root : path
        Dataset folder (created).
    subjects_per_site : int
        Subjects ``sub-01``... at Northfield, then as many at Southbay.
    simulate : bool
        Simulate each scanner's distortion of a phantom (slower); else write
        the undistorted phantom (enough for indexing and planning).
    moved_table : bool
        Give ``sub-01`` a second session with the table moved off isocenter.

    Returns
    -------
    Path
        The dataset root.
    """
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    (root / "dataset_description.json").write_text(json.dumps(
        {"Name": "nl_unwarp FICTIONAL multi-site demo", "BIDSVersion": "1.9.0", "DatasetType": "raw",
         "License": "CC0"}, indent=2) + "\n", encoding="utf-8")
    # Inherited by every bold run (BIDS inheritance principle).
    (root / "task-rest_bold.json").write_text(json.dumps(
        {"TaskName": "rest", "RepetitionTime": 2.0}, indent=2) + "\n", encoding="utf-8")
    participants = ["participant_id\tsite"]
    number = 0
    for site in SITES:
        for _ in range(subjects_per_site):
            number += 1
            sub = f"{number:02d}" if subjects_per_site * len(SITES) < 100 else f"{number:03d}"
            participants.append(f"sub-{sub}\t{site.name}")
            _session(root, sub, "1", site, (0.0, 0.0, 0.0), simulate)
            if moved_table and number == 1:
                _session(root, sub, "2", site, MOVED_TABLE_MM, simulate)
    (root / "participants.tsv").write_text("\n".join(participants) + "\n", encoding="utf-8")
    return root


def run_bids_demo(outdir: str | Path, *, n_procs: int = 2, subjects_per_site: int = 2,
                  step=None, progress=None) -> list[dict]:
    """Generate the invented dataset and run the whole BIDS pipeline on it (MultiProc).

    Writes ``outdir/rawdata`` (the dataset), ``outdir/coils`` (the fictional coil
    models, outside the dataset), ``outdir/sites.json``, ``outdir/derivatives``
    and ``outdir/work``. Returns the per-image summary rows of
    :func:`nl_unwarp.bids.app.run`. ``step(message)`` announces each stage and
    ``progress(done, total)`` counts finished pipeline nodes.
    """
    import os

    from .app import RunOptions, run

    say = step or (lambda _msg: None)
    outdir = Path(outdir)
    say("generating the invented two-site BIDS dataset")
    raw = make_dataset(outdir / "rawdata", subjects_per_site=subjects_per_site)
    write_coils(outdir / "coils")
    os.environ[COIL_DIR_VARIABLE] = str((outdir / "coils").resolve())
    config = write_site_config(outdir / "sites.json")
    say(f"running the BIDS pipeline (MultiProc, {n_procs} processes)")
    rows, failures = run(RunOptions(bids_dir=raw, output_dir=outdir / "derivatives", site_config=config,
                                    work_dir=outdir / "work", plugin="MultiProc", n_procs=n_procs,
                                    progress=progress))
    if failures:
        from ..errors import InputError

        raise InputError(str(outdir / "work"), f"{len(failures)} pipeline step(s) crashed: {failures[0]}")
    return rows
