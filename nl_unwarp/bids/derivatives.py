"""The derivatives dataset: description, corrected images, fields, Jacobians, sidecars.

Each image's derivatives are written as one :class:`~nl_unwarp.io.atomic.OutputSet`
(all files appear together or none do), so a crash never leaves a
half-written derivative; a re-run writes what is missing.
"""

from __future__ import annotations

import json
import re
import shutil
from collections.abc import Iterable, Mapping
from pathlib import Path

from .. import __version__
from ..errors import InputError
from ..io.atomic import OutputSet
from .metadata import PROVENANCE_KEY
from .names import derivative_name

__all__ = [
    "DATASET_LINK",
    "check_description",
    "PIPELINE_NAME",
    "dataset_description",
    "ensure_dataset",
    "remove_partial_files",
    "write_image_derivatives",
]

PIPELINE_NAME = "nl_unwarp"
#: Name of the source dataset in BIDS URIs (``bids:raw:sub-01/...``), defined
#: in DatasetLinks.
DATASET_LINK = "raw"
#: Folder of the HTML reports (nl_unwarp.report.files.REPORTS_DIR; the report layer imports us).
REPORTS_FOLDER = "reports"
_PARTIAL = re.compile(r"^\..+\.partial-[0-9a-f]{8}(\..+)?$")
_DESCRIPTIONS = {
    "corrected": "Image corrected for gradient nonlinearity (pull-back resampling through the "
                 "displacement field; intensities scaled by the Jacobian determinant when stated).",
    "field": "ITK/ANTs displacement field (vectors in LPS mm, NIfTI intent vector): for a point p "
             "of the corrected grid, the scanner's image is sampled at p + d(p).",
    "jacobian": "Jacobian determinant of the gradient-nonlinearity encoding on the corrected grid.",
    "magnitude": "Magnitude of the gradient-nonlinearity displacement, mm, on the corrected grid.",
    "coiltensor": "Gradient coil tensor L (applied diffusion gradient per unit nominal gradient) on the "
                  "corrected grid, in the frame of the bvec file; see NLUnwarpTensor.",
    "bdeviation": "Relative b-value deviation b_eff / b - 1 on the corrected grid, one volume per shell "
                  "(mean over the shell's directions); see NLUnwarpShells.",
}


def dataset_description(source_dir: str | Path, source_description: Mapping | None = None) -> dict:
    """dataset_description.json of the derivatives (BIDS 1.9, derivative datasets)."""
    source = {"URL": Path(source_dir).resolve().as_uri()}
    if source_description and source_description.get("DatasetDOI"):
        source["DOI"] = source_description["DatasetDOI"]
    return {
        "Name": "Gradient-nonlinearity corrected images",
        "BIDSVersion": "1.9.0",
        "DatasetType": "derivative",
        "GeneratedBy": [{"Name": PIPELINE_NAME, "Version": __version__,
                         "Description": "Gradient-nonlinearity correction (research use)."}],
        "SourceDatasets": [source],
        "DatasetLinks": {DATASET_LINK: source["URL"]},
    }


def _is_partial(path: Path) -> bool:
    return path.is_file() and bool(_PARTIAL.match(path.name))


def remove_partial_files(out_dir: str | Path, participants: Iterable[str]) -> list[Path]:
    """Remove temporary ``.NAME.partial-XXXXXXXX`` files left by an interrupted run.

    Only files a run of ``participants`` (labels with ``sub-``) owns are touched: those under
    their ``sub-<label>/`` folders and their report pages (``reports/sub-<label>_*``), and the
    dataset-level files (top folder and the rest of ``reports/``), which every run writes
    under the output folder's lock (:func:`nl_unwarp.io.lock.folder_lock`; hold it while
    calling this). Other participants' files may belong to a run going on now in another job.
    """
    out_dir = Path(out_dir)
    owned = [out_dir / label for label in participants]
    removed = [p for folder in owned if folder.is_dir() for p in folder.rglob(".*.partial-*")]
    removed += [p for p in out_dir.glob(".*.partial-*")]
    reports = out_dir / REPORTS_FOLDER
    mine = tuple(f".{label}_" for label in participants)
    removed += [p for p in reports.glob(".*.partial-*")
                if p.name.startswith(mine) or not p.name.startswith(".sub-")]
    removed = sorted(p for p in removed if _is_partial(p))
    for path in removed:
        path.unlink()
    return removed


def _generated_by(doc: Mapping) -> list[str]:
    entries = doc.get("GeneratedBy") if isinstance(doc, Mapping) else None
    return [str(g.get("Name")) for g in entries or [] if isinstance(g, Mapping)]


def check_description(out_dir: str | Path) -> None:
    """Refuse an output folder whose dataset_description.json is not of a derivatives dataset
    of ours (reads only; nothing is written, not even a lock file, into someone else's folder).

    Raises
    ------
    InputError
        The description is not valid JSON or its GeneratedBy names another pipeline.
    """
    target = Path(out_dir) / "dataset_description.json"
    if not target.exists():
        return
    try:
        names = _generated_by(json.loads(target.read_text(encoding="utf-8")))
    except ValueError:
        raise InputError(str(target), "not valid JSON: not a derivatives dataset of ours; "
                                      "choose another output folder") from None
    if PIPELINE_NAME not in names:
        raise InputError(str(target), f"GeneratedBy names {', '.join(names) or 'no pipeline'}, "
                                      f"not {PIPELINE_NAME}: the folder holds another pipeline's "
                                      "derivatives; choose another output folder")


def ensure_dataset(out_dir: str | Path, bids_dir: str | Path) -> Path:
    """Create the derivatives folder with its dataset_description.json, or check it.

    An existing description of ours that matches is left alone (concurrent runs into one
    folder then never rewrite it); one of ours that differs (another version, the dataset
    bound at another path) is rewritten. Hold the folder's lock while calling this.

    Raises
    ------
    InputError
        The folder's description is not ours (:func:`check_description`).
    """
    out_dir = Path(out_dir)
    src_desc_path = Path(bids_dir) / "dataset_description.json"
    src_desc = json.loads(src_desc_path.read_text(encoding="utf-8")) if src_desc_path.exists() else {}
    target = out_dir / "dataset_description.json"
    text = json.dumps(dataset_description(bids_dir, src_desc), indent=2) + "\n"
    if target.exists() and target.read_text(encoding="utf-8") == text:
        return target
    check_description(out_dir)
    with OutputSet() as out:
        out.reserve(target).write_text(text, encoding="utf-8")
    return target


def _sidecar(kind: str, source_uri: str, metadata: Mapping, provenance: dict) -> dict:
    if kind == "corrected":
        doc = {k: v for k, v in metadata.items() if k != PROVENANCE_KEY}
        doc["NonlinearGradientCorrection"] = True
        doc.pop("NonLinearGradientCorrection", None)
    else:
        doc = {}
    doc.update({"SkullStripped": False, "Sources": [source_uri], "Description": _DESCRIPTIONS[kind],
                PROVENANCE_KEY: provenance})
    return doc


def sidecar_document(kind: str, source_relpath: str, metadata: Mapping, provenance: dict) -> dict:
    """The sidecar of one derivative file, for files made elsewhere and passed as companions."""
    return _sidecar(kind, f"bids:{DATASET_LINK}:{source_relpath}", metadata, provenance)


def write_image_derivatives(
    out_dir: str | Path,
    source_relpath: str,
    *,
    metadata: Mapping,
    provenance: dict,
    files: Mapping[str, str | Path],
    companions: Mapping[str, str | Path] | None = None,
) -> list[Path]:
    """Write one image's derivatives, all at once.

    Parameters
    ----------
    out_dir : path
        Root of the derivatives dataset.
    source_relpath : str
        Source image path relative to the raw dataset.
    metadata : mapping
        The source's sidecar metadata (inheritance applied); the corrected
        image's sidecar carries it.
    provenance : dict
        Our record (software, coil model SHA-256, parameters, decision); stored
        under :data:`~nl_unwarp.bids.metadata.PROVENANCE_KEY`.
    files : mapping
        Kind (``corrected``, ``field``, ``jacobian``, ``magnitude``) -> file to copy in.
    companions : mapping, optional
        Destination path relative to ``out_dir`` -> source file (bval, bvec, events).

    Returns
    -------
    list of Path
        The files written.
    """
    out_dir = Path(out_dir)
    source_uri = f"bids:{DATASET_LINK}:{source_relpath}"
    with OutputSet() as out:
        for kind, path in files.items():
            shutil.copyfile(path, out.reserve(out_dir / derivative_name(source_relpath, kind)))
            sidecar = _sidecar(kind, source_uri, metadata, provenance)
            out.reserve(out_dir / derivative_name(source_relpath, kind, ext=".json")).write_text(
                json.dumps(sidecar, indent=2) + "\n", encoding="utf-8")
        for rel, path in (companions or {}).items():
            shutil.copyfile(path, out.reserve(out_dir / rel))
        return out.commit()


def provenance_record(summary: Mapping, decision: Mapping, parameters: Mapping) -> dict:
    """Our provenance: software, coil model (label and SHA-256, never a path), decision, parameters."""
    keep = ("patient_position", "isocenter_offset_mm", "isocenter_offset_from", "isocenter_ras_mm",
            "mode", "slice_axis", "displacement_max_mm", "displacement_p99_mm", "jacobian_min",
            "jacobian_max", "outside_valid_fraction")
    return {
        "software": dict(summary["software"]),
        "coil_model": {k: summary["coil_model"][k] for k in ("label", "sha256", "degree")},
        "decision": {k: decision[k] for k in ("action", "reason", "rule", "site", "warnings")},
        "parameters": dict(parameters),
        "warp": {k: summary[k] for k in keep},
    }


def sink_image(out_dir: str | Path, source_relpath: str, *, metadata: Mapping, decision: Mapping,
               parameters: Mapping, summary_file: str | Path, files: Mapping[str, str | Path],
               companions: Mapping[str, str | Path] | None = None) -> list[Path]:
    """Write one image's derivatives from a node's work files (see :func:`write_image_derivatives`)."""
    summary = json.loads(Path(summary_file).read_text(encoding="utf-8"))
    provenance = provenance_record(summary, decision, parameters)
    return write_image_derivatives(out_dir, source_relpath, metadata=metadata, provenance=provenance,
                                   files=files, companions=companions)
