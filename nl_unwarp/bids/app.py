"""The BIDS-App run: plan, build the workflow, run it with a nipype plugin, report.

The CLI (``nl-unwarp BIDS_DIR OUTPUT_DIR participant``) parses its options into
:class:`RunOptions` and calls :func:`run`; nothing here parses arguments.
"""

from __future__ import annotations

import gc
import getpass
import json
import logging
import os
from collections.abc import Callable
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import InputError
from ..io.atomic import OutputSet
from ..io.lock import folder_lock
from .names import derivative_name
from .plan import Plan, check_dirs, index_dataset, make_plan

__all__ = ["RunOptions", "build_plan", "merge_decisions", "read_decisions", "run", "runnable_node_count",
           "summary_rows"]

log = logging.getLogger("nl_unwarp")
DECISIONS_FILE = "decisions.tsv"


@dataclass
class RunOptions:
    """Everything a participant-level run needs."""

    bids_dir: Path
    output_dir: Path | None = None
    site_config: Path | None = None
    coil_override: Path | None = None
    participants: list[str] = field(default_factory=list)
    sessions: list[str] = field(default_factory=list)
    datatypes: list[str] = field(default_factory=list)
    suffixes: list[str] = field(default_factory=list)
    tasks: list[str] = field(default_factory=list)
    isocenter_offset_mm: tuple[float, float, float] | None = None
    work_dir: Path | None = None
    plugin: str = "MultiProc"
    plugin_args: dict = field(default_factory=dict)
    n_procs: int | None = None
    omp_nthreads: int | None = None
    order: int = 3
    jacobian: bool = True
    emit_warp_for_skipped: bool = False
    #: Voxel size (mm) of the field files' grids; None: each image's voxels.
    field_spacing_mm: float | None = None
    #: Called as ``progress(done, total)`` each time a workflow node finishes.
    progress: Callable[[int, int], None] | None = None


def check_options(options: RunOptions) -> None:
    """Refuse option values that no image could use (before any indexing or writing)."""
    from ..api import check_field_spacing

    check_field_spacing(options.field_spacing_mm)


def build_plan(options: RunOptions) -> Plan:
    """Index the dataset and decide for every selected image (nothing computed)."""
    from .siteconfig import SiteConfig, load_site_config

    check_options(options)
    check_dirs(options.bids_dir, options.output_dir, options.work_dir)
    if options.site_config is None and options.coil_override is None:
        raise InputError("--site-config", "give a site configuration (or a coil model override)")
    config = (load_site_config(options.site_config) if options.site_config is not None
              else SiteConfig.empty())
    layout = index_dataset(options.bids_dir)
    plan = make_plan(layout, config, participants=options.participants, sessions=options.sessions,
                     datatypes=options.datatypes, suffixes=options.suffixes, tasks=options.tasks,
                     coil_override=options.coil_override,
                     isocenter_offset_mm=options.isocenter_offset_mm)
    if not plan.rows:
        raise InputError(str(options.bids_dir), "no image matches the participant/session/datatype/"
                                                "suffix filters")
    return plan


def _status_callback(total: int, progress: Callable[[int, int], None]):
    """A nipype ``status_callback`` that counts finished nodes (Linear, MultiProc, ...).

    Each node counts once: nipype reports a node that fails in the main process twice
    (``exception``, then ``end``; nipype.pipeline.plugins.base).
    """
    finished: set = set()

    def callback(node, status: str) -> None:
        if status in ("end", "exception"):
            finished.add(getattr(node, "fullname", id(node)))
            progress(min(len(finished), total), total)

    return callback


def runnable_node_count(workflow) -> int:
    """How many nodes nipype runs for ``workflow``: its nodes but the plain IdentityInterface
    ones (``inputnode``, ``outputnode``), which nipype removes from the graph it executes
    (``_remove_nonjoin_identity_nodes`` in nipype.pipeline.engine.utils). A MapNode counts
    once, though nipype reports each of its subnodes too (our BIDS workflow has none)."""
    from nipype.interfaces.utility import IdentityInterface

    count = 0
    for name in workflow.list_node_names():
        node = workflow.get_node(name)
        removed = (isinstance(node.interface, IdentityInterface) and node.iterables is None
                   and not hasattr(node, "joinsource"))
        count += not removed
    return count


def _plugin_args(options: RunOptions, total_nodes: int = 0) -> dict:
    args = dict(options.plugin_args)
    if options.progress is not None and total_nodes:
        args.setdefault("status_callback", _status_callback(total_nodes, options.progress))
    if options.plugin == "MultiProc":
        args.setdefault("n_procs", options.n_procs or os.cpu_count() or 1)
        # Fresh worker processes: forking a parent whose numba thread pool has
        # started is unsafe (numba documentation, "threading layers").
        args.setdefault("mp_context", "forkserver")
    return args


#: Seconds nipype's scheduler sleeps between rounds with the local plugins. nipype's default
#: (2 s, ``poll_sleep_duration``) is paid once per node on a branch's chain of dependent
#: nodes, which made MultiProc slower than Linear on a few subjects (benchmarks/bench_load.py);
#: MultiProc's results arrive in-process, so a short sleep costs little. Batch plugins keep
#: nipype's default: each round there asks the scheduler (squeue, qstat) about every job.
LOCAL_POLL_S = 0.1
LOCAL_PLUGINS = ("MultiProc", "Linear", "LegacyMultiProc")


def _execution_config(plugin: str, crash_dir: Path) -> dict:
    """The workflow's nipype ``execution`` settings for this run."""
    settings = {"crashdump_dir": str(crash_dir), "hash_method": "content", "crashfile_format": "txt",
                "stop_on_first_crash": False}
    if plugin in LOCAL_PLUGINS:
        settings["poll_sleep_duration"] = LOCAL_POLL_S
    return settings


@contextmanager
def _frozen_heap():
    """Keep what exists now (imports, dataset index, workflow) out of the garbage collector's scans.

    nipype's MultiProc calls ``gc.collect()`` after every node it runs in the main process
    (our sinks); each full collection walks the whole heap, which made those calls most of
    a run's time on tens of subjects (benchmarks/bench_load.py). ``gc.freeze`` (Python
    documentation, gc module) moves the objects alive now to a generation that is never
    scanned; objects made during the run are collected as usual.
    """
    gc.freeze()
    try:
        yield
    finally:
        gc.unfreeze()


def _set_threads(n: int | None) -> None:
    if n:
        for var in ("NUMBA_NUM_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
            os.environ[var] = str(n)


def _set_login_name() -> None:
    """Give batch plugins a ``LOGNAME``: nipype's SLURM, SGE, PBS, LSF, OAR and Condor
    plugins read ``os.environ["LOGNAME"]`` for job names and fail without it (cron jobs,
    CI, containers run with an arbitrary uid have none)."""
    if os.environ.get("LOGNAME"):
        return
    try:
        name = getpass.getuser()
    except (KeyError, OSError):  # no passwd entry for this uid (containers)
        name = f"uid{os.getuid()}"
    os.environ["LOGNAME"] = name


@contextmanager
def _worker_config(work_dir: Path):
    """nipype settings for worker processes, which read them at import (not from this process).

    ``NIPYPE_CONFIG_DIR`` is set for the run only and restored after it: a caller that runs
    the app in its own process (a test, a notebook) keeps its environment, and the nipype
    processes it starts later do not inherit this run's settings.
    """
    folder = work_dir / "nipype_config"
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "nipype.cfg").write_text(
        "[logging]\nworkflow_level = WARNING\ninterface_level = WARNING\nutils_level = WARNING\n"
        "[execution]\nhash_method = content\ncrashfile_format = txt\n", encoding="utf-8")
    before = os.environ.get("NIPYPE_CONFIG_DIR")
    os.environ["NIPYPE_CONFIG_DIR"] = str(folder)
    try:
        yield folder
    finally:
        if before is None:
            os.environ.pop("NIPYPE_CONFIG_DIR", None)
        else:
            os.environ["NIPYPE_CONFIG_DIR"] = before


def summary_rows(plan: Plan, output_dir: Path) -> list[dict]:
    """Per image: decision, reason, rule, and the maximum displacement if a derivative exists."""
    rows = []
    for r in plan.rows:
        row = {"image": r.relpath, "rule": r.decision.rule, "site": r.decision.site,
               "decision": r.decision.action, "reason": r.decision.reason,
               "warnings": "; ".join(r.decision.warnings), "displacement_max_mm": None, "done": False}
        sidecar = output_dir / derivative_name(r.relpath, "field", ext=".json")
        if sidecar.exists():
            prov = json.loads(sidecar.read_text(encoding="utf-8"))["NLUnwarpProvenance"]
            row["displacement_max_mm"] = prov["warp"]["displacement_max_mm"]
            row["done"] = True
        rows.append(row)
    return rows


#: Columns of decisions.tsv, one row per image; ``image`` is the key that runs merge on.
DECISION_COLUMNS = ("image", "site", "rule", "decision", "displacement_max_mm", "reason", "warnings")


def _tsv_cell(value) -> str:
    """A table cell: tabs and line breaks would split the row, so they become spaces."""
    return " ".join(str(value).split("\t")).replace("\r", " ").replace("\n", " ")


def _decision_line(row: dict) -> str:
    value = {**row, "displacement_max_mm": "n/a" if row["displacement_max_mm"] is None
             else f"{row['displacement_max_mm']:.4f}"}
    return "\t".join(_tsv_cell(value[c]) for c in DECISION_COLUMNS)


def read_decisions(path: Path) -> dict[str, str]:
    """The rows of an existing decisions.tsv by image (empty if there is none).

    Raises
    ------
    InputError
        The header is not ours or a row has the wrong number of cells.
    """
    if not path.exists():
        return {}
    lines = path.read_text(encoding="utf-8").splitlines()
    if not lines or lines[0] != "\t".join(DECISION_COLUMNS):
        raise InputError(str(path), "header differs from nl_unwarp's decision table "
                                    f"({', '.join(DECISION_COLUMNS)}); move the file away")
    rows = {}
    for number, line in enumerate(lines[1:], start=2):
        cells = line.split("\t")
        if len(cells) != len(DECISION_COLUMNS):
            raise InputError(str(path), f"line {number}: {len(cells)} cells, expected "
                                        f"{len(DECISION_COLUMNS)}; fix or remove the line")
        rows[cells[0]] = line
    return rows


def merge_decisions(rows: list[dict], output_dir: Path) -> Path:
    """Write decisions.tsv: this run's rows replace those of the same images, the others stay.

    Rows are sorted by image, so the table does not depend on the order of the runs that
    filled it. Hold the folder's lock (:func:`nl_unwarp.io.lock.folder_lock`) around the call:
    it reads, merges and writes.
    """
    target = output_dir / DECISIONS_FILE
    merged = read_decisions(target)
    merged.update({row["image"]: _decision_line(row) for row in rows})
    lines = ["\t".join(DECISION_COLUMNS), *(merged[image] for image in sorted(merged))]
    with OutputSet() as out:
        out.reserve(target).write_text("\n".join(lines) + "\n", encoding="utf-8")
        bidsignore = output_dir / ".bidsignore"
        text = DECISIONS_FILE + "\nreports/\n"
        if not bidsignore.exists() or bidsignore.read_text(encoding="utf-8") != text:
            out.reserve(bidsignore).write_text(text, encoding="utf-8")
    return target


def participants_of(plan: Plan) -> list[str]:
    """The participant labels (``sub-XX``) of a plan's images."""
    return sorted({row.relpath.split("/", 1)[0] for row in plan.rows})


def run(options: RunOptions, *, plan: Plan | None = None) -> tuple[list[dict], list[str]]:
    """Correct the selected images and write the derivatives dataset.

    Returns
    -------
    rows : list of dict
        :func:`summary_rows` after the run.
    failures : list of str
        Nodes that crashed (their images have no derivative; a re-run redoes
        only what is missing, the rest comes from the work directory's cache).
    """
    from nipype import config as nipype_config

    from ..workflows.bids import init_bids_unwarp_wf
    from .derivatives import check_description, ensure_dataset, remove_partial_files

    check_options(options)
    plan = plan or build_plan(options)
    plan.raise_problems()
    output_dir = Path(options.output_dir).resolve()
    work_dir = Path(options.work_dir or output_dir.parent / "nl_unwarp_work").resolve()
    # Several runs (cluster jobs, one per participant) may share the output folder; the
    # dataset-level files are read, merged and written under its lock.
    check_description(output_dir)
    with folder_lock(output_dir):
        ensure_dataset(output_dir, options.bids_dir)
        for stale in remove_partial_files(output_dir, participants_of(plan)):
            log.warning("removed %s, left by an interrupted run", stale)
    _set_threads(options.omp_nthreads)
    _set_login_name()
    workflow = init_bids_unwarp_wf(plan=plan, output_dir=output_dir, site_config=options.site_config,
                                   coil_override=options.coil_override, jacobian=options.jacobian,
                                   order=options.order,
                                   emit_warp_for_skipped=options.emit_warp_for_skipped,
                                   field_spacing_mm=options.field_spacing_mm)
    workflow.base_dir = str(work_dir)
    crash_dir = work_dir / "crash"
    nipype_config.update_config({"execution": {"crashdump_dir": str(crash_dir), "hash_method": "content",
                                               "crashfile_format": "txt"},
                                 "logging": {"workflow_level": "WARNING", "interface_level": "WARNING",
                                             "utils_level": "WARNING"}})
    from nipype import logging as nipype_logging

    nipype_logging.update_logging(nipype_config)
    workflow.config["execution"].update(_execution_config(options.plugin, crash_dir))
    failures = []
    if workflow.list_node_names():
        before = set(crash_dir.glob("crash-*")) if crash_dir.exists() else set()
        try:
            with _worker_config(work_dir), _frozen_heap():
                workflow.run(plugin=options.plugin,
                             plugin_args=_plugin_args(options, runnable_node_count(workflow)))
        except RuntimeError:
            after = set(crash_dir.glob("crash-*")) if crash_dir.exists() else set()
            failures = sorted(str(p) for p in after - before) or ["see the nipype log"]
    rows = summary_rows(plan, output_dir)
    from ..report.files import write_dataset_report

    with folder_lock(output_dir):
        merge_decisions(rows, output_dir)
        write_dataset_report(output_dir, plan)
    return rows, failures
