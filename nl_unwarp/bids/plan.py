"""Index a BIDS dataset and decide, for every selected image, what to do.

Nothing is computed here beyond reading sidecars and image headers: the plan is
what ``nl-unwarp plan`` prints and what the workflow is built from.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import InputError
from .decisions import Decision, decide
from .names import derivative_name
from .siteconfig import SiteConfig

__all__ = ["DATATYPES", "Plan", "PlanRow", "check_dirs", "format_table", "index_dataset", "make_plan"]

#: Datatypes searched by default (MRI images that carry gradient distortion).
DATATYPES = ("anat", "func", "dwi", "fmap", "perf")
IMAGE_EXTENSIONS = (".nii", ".nii.gz")


@dataclass
class PlanRow:
    """One image: where it is, its metadata and the decision (or the problem)."""

    relpath: str
    path: str
    entities: dict
    metadata: dict = field(default_factory=dict)
    decision: Decision | None = None
    problem: str | None = None
    #: Destination (relative to the derivatives root) -> source file: bval, bvec, events.
    companions: dict[str, str] = field(default_factory=dict)

    @property
    def status(self) -> str:
        return "error" if self.problem else self.decision.action


@dataclass
class Plan:
    """The decisions for a dataset."""

    bids_dir: Path
    rows: list[PlanRow]

    @property
    def problems(self) -> list[PlanRow]:
        return [r for r in self.rows if r.problem]

    def raise_problems(self) -> None:
        """Raise one InputError listing every image with a problem."""
        bad = self.problems
        if bad:
            listed = "\n  ".join(f"{r.relpath}: {r.problem}" for r in bad)
            raise InputError(str(self.bids_dir), f"{len(bad)} image(s) cannot be planned "
                                                 f"(nothing was computed):\n  {listed}")


def _inside(child: Path, parent: Path) -> bool:
    return child == parent or parent in child.parents


def check_dirs(bids_dir: str | Path, output_dir: str | Path | None = None,
               work_dir: str | Path | None = None) -> Path:
    """Check the dataset folder, and that outputs do not land inside the dataset.

    The output may sit under ``<bids_dir>/derivatives/`` (the BIDS place for
    derivatives, which indexing ignores); anywhere else inside the dataset is
    refused. Returns the resolved dataset path.
    """
    root = Path(bids_dir).resolve()
    if not root.is_dir():
        raise InputError(str(bids_dir), "BIDS dataset folder not found")
    if not (root / "dataset_description.json").is_file():
        raise InputError(str(bids_dir), "not a BIDS dataset: dataset_description.json is missing "
                                        "at its top level")
    if output_dir is not None:
        out = Path(output_dir).resolve()
        if _inside(root, out):
            raise InputError(str(output_dir), "output directory contains the input dataset; "
                                              "choose a folder outside it")
        if _inside(out, root) and not _inside(out, root / "derivatives"):
            raise InputError(str(output_dir), "output directory is inside the input dataset; choose "
                                              f"a folder outside it or under {root / 'derivatives'}")
    if work_dir is not None and _inside(Path(work_dir).resolve(), root):
        raise InputError(str(work_dir), "work directory is inside the input dataset; choose a "
                                        "folder outside it")
    return root


def index_dataset(bids_dir: str | Path):
    """A pybids BIDSLayout of the raw dataset (derivatives not indexed)."""
    from bids import BIDSLayout

    root = check_dirs(bids_dir)
    try:
        return BIDSLayout(str(root), validate=True, derivatives=False)
    except Exception as exc:  # pybids raises several types for a broken dataset
        raise InputError(str(bids_dir), f"pybids cannot index the dataset ({exc})") from None


def _query(participants, sessions, datatypes, suffixes, tasks, runs) -> dict:
    query = {"extension": list(IMAGE_EXTENSIONS), "datatype": list(datatypes or DATATYPES)}
    for key, values in (("subject", participants), ("session", sessions), ("suffix", suffixes),
                        ("task", tasks), ("run", runs)):
        if values:
            query[key] = [v.removeprefix("sub-").removeprefix("ses-") if isinstance(v, str) else v
                          for v in values]
    return query


def _beside(image_path: str, suffix: str, drop: tuple[str, ...] = ()) -> str | None:
    """A companion file in the image's own folder (the common case, and fast)."""
    from .names import split_bids_name

    path = Path(image_path)
    prefix, _suffix, _ext = split_bids_name(path.name)
    parts = [p for p in prefix.split("_") if p.split("-")[0] not in drop]
    candidate = path.with_name("_".join(parts) + suffix)
    return str(candidate) if candidate.exists() else None


def _companions(layout, image, relpath: str) -> dict[str, str]:
    """bval/bvec of a dwi, events of a bold run: beside the image, else by BIDS inheritance."""
    out = {}
    if image.entities.get("suffix") == "dwi":
        for ext in ("bval", "bvec"):
            src = _beside(image.path, f"_dwi.{ext}")
            if src is None:
                try:
                    src = getattr(layout, f"get_{ext}")(image.path)
                except Exception:  # pybids raises when there is none
                    src = None
            if src:
                out[derivative_name(relpath, "corrected", ext=f".{ext}")] = src
    if image.entities.get("suffix") in ("bold", "cbv", "asl", "m0scan"):
        events = _beside(image.path, "_events.tsv", drop=("echo", "part"))
        if events is None:
            events = layout.get_nearest(image.path, suffix="events", extension=".tsv", strict=False,
                                        ignore_strict_entities=["suffix", "extension", "echo", "part"])
        if events:
            out[str(Path(events).relative_to(layout.root).as_posix())] = events
    return out


def _affine(path: str):
    import nibabel as nib

    try:
        return nib.load(path).affine
    except Exception as exc:  # nibabel raises many types for a broken header
        raise InputError(path, f"unreadable NIfTI header ({exc})") from None


def make_plan(
    layout,
    config: SiteConfig,
    *,
    participants: Sequence[str] = (),
    sessions: Sequence[str] = (),
    datatypes: Sequence[str] = (),
    suffixes: Sequence[str] = (),
    tasks: Sequence[str] = (),
    runs: Sequence = (),
    coil_override: str | Path | None = None,
    isocenter_offset_mm: Sequence[float] | None = None,
) -> Plan:
    """Decide for every selected image; problems are recorded per row, not raised."""
    images = layout.get(**_query(participants, sessions, datatypes, suffixes, tasks, runs))
    rows = []
    for image in sorted(images, key=lambda f: f.path):
        rel = Path(image.path).relative_to(layout.root).as_posix()
        row = PlanRow(rel, image.path, dict(image.entities))
        try:
            row.metadata = dict(layout.get_metadata(image.path))
            if not row.metadata:
                raise InputError(image.path, "no sidecar metadata (no JSON beside the image and none "
                                             "inherited from a parent folder)")
            row.decision = decide(row.metadata, config, src=image.path, affine=_affine(image.path),
                                  coil_override=coil_override,
                                  isocenter_offset_mm=tuple(isocenter_offset_mm)
                                  if isocenter_offset_mm is not None else None)
            row.companions = _companions(layout, image, rel)
        except InputError as exc:
            row.problem = exc.detail
        rows.append(row)
    return Plan(Path(layout.root), rows)


def format_table(plan: Plan) -> str:
    """Plain-text table: image, matched rule, decision, reason (and warnings)."""
    header = ("image", "rule", "decision", "reason")
    lines = []
    for r in plan.rows:
        d = r.decision
        reason = r.problem if r.problem else d.reason
        if d and d.warnings:
            reason += " [warning: " + "; ".join(d.warnings) + "]"
        lines.append((r.relpath, d.rule if d else "-", r.status, reason))
    widths = [max([len(header[i])] + [len(line[i]) for line in lines]) for i in range(3)]
    fmt = "  ".join(f"{{:{w}}}" for w in widths) + "  {}"
    return "\n".join(fmt.format(*row) for row in [header, *lines])
