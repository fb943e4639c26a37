"""Command line: ``nl-unwarp warp|correct|describe|import|demo|fit|...``.

The CLI parses, calls library functions, and reports. Exit codes: 0 done,
1 failure (a one-line message says which file and field), 2 usage error.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import time
from pathlib import Path

from . import __version__
from .compose import FIELD_MARGIN_MM
from .errors import InputError
from .frames import PATIENT_POSITIONS
from .resample import ORDERS
from .warp import MODES

PROG = "nl-unwarp"
CAUTION = ("For research pipelines only: not for diagnosis. Defer to your local scanner QA and "
           "licensed practice.")


class _Progress:
    """Step messages with elapsed time on stderr."""

    def __init__(self, quiet: bool = False) -> None:
        self.quiet = quiet
        self.start = time.perf_counter()
        self._last_nodes = 0.0
        self._nodes_latest: tuple[int, int] | None = None  # last count reported
        self._nodes_printed: tuple[int, int] | None = None  # last count printed
        self._line_open = False  # a count is printed and its line not ended

    def step(self, message: str) -> None:
        if not self.quiet:
            print(f"[{time.perf_counter() - self.start:6.1f} s] {message}", file=sys.stderr, flush=True)

    def nodes(self, done: int, total: int) -> None:
        """Workflow nodes finished, on one updating line (at most about once a second)."""
        self._nodes_latest = (done, total)
        now = time.perf_counter()
        if done < total and now - self._last_nodes < 1.0:
            return
        self._last_nodes = now
        self._print_nodes(done, total, end="\n" if done == total else "")

    def _print_nodes(self, done: int, total: int, end: str) -> None:
        self._nodes_printed, self._line_open = (done, total), not end
        if not self.quiet:
            print(f"\r  {done}/{total} pipeline steps done", end=end, file=sys.stderr, flush=True)

    def end_nodes(self) -> None:
        """The run is over: print the last count if it was not, and end its line. Steps that
        crash (or depend on one that did) never finish, so the count may stop short of the total."""
        latest = self._nodes_latest
        if latest is not None and (self._line_open or self._nodes_printed != latest):
            self._print_nodes(*latest, end="\n")
        self._nodes_latest = self._nodes_printed = None
        self._line_open = False

    def volumes(self, done: int, total: int) -> None:
        if total > 1 and not self.quiet:
            print(f"\r  volume {done}/{total}", end="\n" if done == total else "", file=sys.stderr,
                  flush=True)


def _add_frame_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("patient and table (device frame)")
    g.add_argument("--position", default="HFS", type=str.upper, choices=sorted(PATIENT_POSITIONS),
                   help="DICOM PatientPosition (default: HFS)")
    g.add_argument("--table-position", nargs=3, type=float, metavar=("TP1", "TP2", "TP3"),
                   help="BIDS TablePosition, mm (left, up, into the bore)")
    g.add_argument("--isocenter-offset", nargs=3, type=float, metavar=("DX", "DY", "DZ"),
                   help="device coordinates (mm) of the world origin; overrides --table-position")
    g = p.add_argument_group("2D acquisitions")
    g.add_argument("--mode", choices=MODES, default="full",
                   help="correct all of the displacement, only in the slice plane, or only "
                        "normal to it (default: full)")
    g.add_argument("--slice-axis", choices=("i", "j", "k"),
                   help="voxel axis normal to the slices (default: the axis of largest spacing)")


def _add_warp_outputs(p: argparse.ArgumentParser, *, required_field: bool) -> None:
    g = p.add_argument_group("warp products")
    g.add_argument("--out-field", required=required_field,
                   help="ITK/ANTs displacement field (NIfTI, LPS, intent vector)")
    g.add_argument("--out-jacobian", help="Jacobian determinant map")
    g.add_argument("--out-magnitude", help="displacement magnitude map, mm")
    g.add_argument("--out-mask", help="mask of voxels beyond the model's valid radius")
    g.add_argument("--out-summary", help="summary JSON")
    g.add_argument("--field-margin", type=float, default=FIELD_MARGIN_MM, metavar="MM",
                   help="the field's grid extends this far beyond the image on every side, so that "
                        "registration and ITK-style tools (identity outside a field) never leave it; "
                        f"the other maps stay on the image's grid (default: {FIELD_MARGIN_MM:g}; 0: "
                        "the image's grid)")
    g.add_argument("--field-spacing", type=float, metavar="MM",
                   help="voxel size of the field's grid, mm, on the image's axes (default: the image's "
                        "voxels); e.g. 2 writes an eighth of the data of a 1 mm field; tools read it "
                        "trilinearly, and the summary gives the largest deviation of that reading "
                        "from the warp used on the image")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog=PROG, description="Gradient-nonlinearity correction for MRI. " + CAUTION)
    parser.add_argument("--version", action="version", version=f"%(prog)s {__version__}")
    parser.add_argument("--quiet", action="store_true", help="no progress messages")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("warp", help="make the warp for an image grid")
    p.add_argument("reference", help="image whose grid the warp is computed on")
    p.add_argument("--coil", required=True, help="coil model file (nl_unwarp-coil JSON)")
    _add_frame_options(p)
    _add_warp_outputs(p, required_field=True)

    p = sub.add_parser("correct", help="correct an image (optionally writing the warp)")
    p.add_argument("source", help="raw (distorted) image, 3-D or 4-D")
    p.add_argument("corrected", help="corrected image to write")
    p.add_argument("--coil", required=True, help="coil model file (nl_unwarp-coil JSON)")
    p.add_argument("--order", type=int, choices=ORDERS, default=3,
                   help="B-spline interpolation order (default: 3, cubic)")
    p.add_argument("--no-jacobian", action="store_true",
                   help="do not multiply by the Jacobian determinant")
    p.add_argument("--fill", type=float, default=0.0, help="value outside the field of view")
    p.add_argument("--keep-dtype", action="store_true",
                   help="write the input data type (integers rounded and clipped)")
    p.add_argument("--report", metavar="HTML",
                   help="write the HTML quality report (and the coil model page beside it)")
    _add_frame_options(p)
    _add_warp_outputs(p, required_field=False)

    p = sub.add_parser("describe", help="describe a coil model")
    p.add_argument("coil", help="coil model file")
    p.add_argument("--json", action="store_true", help="print JSON")

    p = sub.add_parser("import", help="make a coil model file from a plain table")
    p.add_argument("table", help="TSV/CSV with columns axis, degree, order, kind, value")
    p.add_argument("output", help="coil model file to write")
    p.add_argument("--normalisation", required=True, choices=("schmidt", "unnormalised", "orthonormal"))
    p.add_argument("--condon-shortley", action="store_true",
                   help="the table's functions include the (-1)^m phase")
    p.add_argument("--reference-radius-mm", type=float, required=True)
    p.add_argument("--valid-radius-mm", type=float, required=True)
    p.add_argument("--gradient-mT-per-m", type=float,
                   help="values are field coefficients in mT at this nominal gradient")
    p.add_argument("--label", default="imported")
    p.add_argument("--description", default="")
    p.add_argument("--date", default="")
    p.add_argument("--source-kind", choices=("design", "measurement", "fit"), default="design")

    p = sub.add_parser("demo", help="run the main job on the embedded fictional demo")
    p.add_argument("outdir", help="folder for the demo's images and summary")
    p.add_argument("--phantom-only", action="store_true",
                   help="only the phantom check, not the multi-site BIDS pipeline")
    p.add_argument("--nprocs", type=int, default=2, help="processes for the BIDS pipeline (default: 2)")

    p = sub.add_parser("plan", help="print every image's scanner rule and decision (computes nothing)")
    p.add_argument("bids_dir", help="BIDS dataset")
    _add_bids_selection(p)
    p.add_argument("--json", action="store_true", help="print JSON")

    _add_compose_parser(sub)
    _add_report_parser(sub)
    _add_dwi_parser(sub)
    _add_fit_parser(sub)
    return parser


#: The order convention of ``compose`` (nl_unwarp.compose; CONVENTIONS.md section 4).
COMPOSE_ORDER = ("in application order: the first is applied first to a point of the reference grid, "
                 "the last lands in the raw image (antspyx transformlist / nitransforms order; the "
                 "reverse of ITK CompositeTransform), e.g. warp, affine, correction")


def _add_compose_parser(sub) -> None:
    p = sub.add_parser(
        "compose", help="fold transforms (affines, fields) into one field: resample the raw image once",
        description="Fold a chain of ITK affines (.txt/.tfm/.mat), ITK/ANTs displacement fields "
                    "(.nii[.gz]), ITK composite (.h5) or X5 chains into one ITK displacement field "
                    "on a reference grid, and/or resample the raw image once through the chain "
                    "(--source, --out-image: no composed field is stored). ORDER: list the transforms "
                    + COMPOSE_ORDER + ". INTENSITY: with --jacobian-map (our Jacobian output) the "
                    "image is multiplied by det J where the last transform, the correction, is "
                    "applied, as correcting and then registering would. COVERAGE: outside a field's "
                    "grid, ITK and similar tools apply identity without a word; reference points that "
                    "meet a field there are reported (--on-outside warn, the default) or refused "
                    "(raise). Our fields carry a margin around the raw field of view for this reason.")
    p.add_argument("transforms", nargs="+", help="transform files, in application order (see above)")
    p.add_argument("--reference", required=True, help="image whose grid the outputs are on")
    p.add_argument("--out-field", help="composed ITK/ANTs displacement field (NIfTI, LPS, intent vector)")
    p.add_argument("--out-composite",
                   help="also write the chain un-folded: ITK composite (.h5) or X5 (.x5)")
    p.add_argument("--source", help="raw image to resample once through the chain (with --out-image)")
    p.add_argument("--out-image", help="the source resampled once onto the reference grid (float32)")
    p.add_argument("--jacobian-map",
                   help="our correction's Jacobian determinant map: multiplies the resampled image by "
                        "det J at each reference point's corrected-space position (applied when given)")
    p.add_argument("--out-factor", help="that intensity factor on the reference grid (needs --jacobian-map), "
                                        "for tools that apply --out-field")
    p.add_argument("--order", type=int, choices=ORDERS, default=3,
                   help="B-spline order of the resampling (default: 3, cubic)")
    p.add_argument("--fill", type=float, default=0.0, help="value outside the raw field of view")
    p.add_argument("--raw", help="raw image: only target points landing inside it count as uncovered "
                                 "(default: --source)")
    p.add_argument("--on-outside", choices=("warn", "raise", "ignore"), default="warn",
                   help="target points meeting a field outside its grid (where ITK applies identity): "
                        "warn (default), fail, or ignore")


def _frame_spec(args):
    from .api import FrameSpec

    return FrameSpec(args.position,
                     tuple(args.table_position) if args.table_position else None,
                     tuple(args.isocenter_offset) if args.isocenter_offset else None)


def _warp_outputs(args):
    from .api import WarpOutputs

    return WarpOutputs(args.out_field, args.out_jacobian, args.out_magnitude, args.out_mask,
                       args.out_summary, field_margin_mm=args.field_margin,
                       field_spacing_mm=args.field_spacing)


def _slice_axis(args):
    return None if args.slice_axis is None else "ijk".index(args.slice_axis)


def _print_warp_summary(s: dict) -> None:
    print(f"coil model       {s['coil_model']['label']} (sha256 {str(s['coil_model']['sha256'])[:12]})")
    print(f"position         {s['patient_position']}; isocenter at RAS "
          f"{', '.join(f'{v:.1f}' for v in s['isocenter_ras_mm'])} mm ({s['isocenter_offset_from']})")
    print(f"mode             {s['mode']}")
    print(f"displacement     max {s['displacement_max_mm']:.3f} mm, "
          f"99th pct {s['displacement_p99_mm']:.3f} mm")
    print(f"jacobian         {s['jacobian_min']:.4f} .. {s['jacobian_max']:.4f}")
    print(f"beyond valid r.  {100 * s['outside_valid_fraction']:.1f} % of voxels")
    print(f"warp lattice     {s['lattice_mm']:g} mm, "
          f"interpolation error {s['interpolation_error_mm']:.2e} mm")
    if "field_grid" in s:
        f = s["field_grid"]
        print(f"field grid       {' x '.join(str(n) for n in f['shape'])} at "
              f"{' x '.join(f'{v:g}' for v in f['spacing_mm'])} mm, margin {f['margin_mm']:g} mm; "
              f"read trilinearly it is within {f['deviation_max_mm']:.1e} mm of the image's warp")


def _cmd_warp(args, progress: _Progress) -> None:
    from .api import warp_file

    progress.step(f"computing the warp on the grid of {args.reference}")
    summary = warp_file(args.reference, args.coil, _warp_outputs(args), frame=_frame_spec(args),
                        mode=args.mode, slice_axis=_slice_axis(args))
    _print_warp_summary(summary)
    print(f"wrote            {args.out_field}")


def _cmd_correct(args, progress: _Progress) -> None:
    from .api import correct_file

    progress.step(f"correcting {args.source}")
    with _report_scratch(args) as outputs:
        summary = correct_file(args.source, args.coil, args.corrected, warp_outputs=outputs,
                               frame=_frame_spec(args), mode=args.mode, slice_axis=_slice_axis(args),
                               order=args.order, jacobian=not args.no_jacobian, fill=args.fill,
                               keep_dtype=args.keep_dtype, progress=progress.volumes)
        _print_warp_summary(summary)
        print(f"wrote            {args.corrected}")
        if args.report:
            from .report.files import write_correction_report

            progress.step("writing the quality report")
            pages = write_correction_report(args.report, raw_file=args.source, corrected_file=args.corrected,
                                            summary=summary, field_file=outputs.field,
                                            jacobian_file=outputs.jacobian, coil_file=args.coil,
                                            magnitude_file=outputs.magnitude)
            print(f"report           {pages[0]} (coil model page {pages[1].name})")


def _cmd_describe(args, progress: _Progress) -> None:
    from .api import displacement_table
    from .io.coilfile import coil_sha256, load_coil

    coil = load_coil(args.coil)
    table = displacement_table(coil)
    info = {"label": coil.label, "sha256": coil_sha256(args.coil), "degree": coil.degree,
            "valid_radius_mm": coil.valid_radius_mm, "source": coil.source,
            "reference_radius_mm": {a: coil.axes[a].reference_radius_mm for a in "xyz"},
            "displacement": table}
    if args.json:
        print(json.dumps(info, indent=2))
        return
    print(f"{coil.label}\n  sha256 {info['sha256']}\n  degree {coil.degree}, valid radius "
          f"{coil.valid_radius_mm:g} mm, source: {coil.source.get('kind', 'unknown')}")
    print("  radius (mm)   max |d| (mm)   rms |d| (mm)")
    for row in table:
        flag = "" if row["inside_valid_radius"] else "   beyond valid radius"
        print(f"  {row['radius_mm']:10.0f}   {row['max_mm']:12.3f}   {row['rms_mm']:12.3f}{flag}")


def _cmd_import(args, progress: _Progress) -> None:
    from .io.coilfile import import_table, save_coil

    model = import_table(args.table, normalisation=args.normalisation,
                         condon_shortley=args.condon_shortley,
                         reference_radius_mm=args.reference_radius_mm,
                         valid_radius_mm=args.valid_radius_mm,
                         gradient_mT_per_m=args.gradient_mT_per_m, label=args.label,
                         description=args.description, date=args.date, kind=args.source_kind)
    save_coil(model, args.output)
    print(f"wrote {args.output} (degree {model.degree})")


def _cmd_demo(args, progress: _Progress) -> None:
    from .demo import run_demo

    result = run_demo(args.outdir, step=progress.step)
    w, before, after = result["warp"], result["before"], result["after"]
    print("nl_unwarp demo: FICTIONAL gradient system, synthetic phantom")
    _print_warp_summary(w)
    print("                      before      after")
    print(f"marker error max  {before['marker_error_max_mm']:9.3f}  {after['marker_error_max_mm']:9.3f}  mm")
    print(f"marker error mean {before['marker_error_mean_mm']:9.3f}  "
          f"{after['marker_error_mean_mm']:9.3f}  mm")
    print(f"uniformity dev.   {100 * before['uniformity_max_deviation']:8.3f}%  "
          f"{100 * after['uniformity_max_deviation']:8.3f}%")
    print(f"outputs in {Path(args.outdir)}")
    if not args.phantom_only:
        from .bids.demodata import run_bids_demo

        try:
            rows = run_bids_demo(Path(args.outdir) / "bids_demo", n_procs=args.nprocs,
                                 step=progress.step, progress=progress.nodes)
        finally:
            progress.end_nodes()
        print("\nmulti-site BIDS pipeline: FICTIONAL sites, scanners and subjects")
        _print_run_rows(rows)
        print(f"derivatives in {Path(args.outdir) / 'bids_demo' / 'derivatives'}")
        print(f"report         {Path(args.outdir) / 'bids_demo' / 'derivatives' / 'reports' / 'index.html'}")
    print(CAUTION)


# BIDS: the participant-level run (BIDS-App convention) and the decision table.

PLUGINS_HELP = ("nipype execution plugin: Linear, MultiProc (default), or a scheduler plugin "
                "(SLURM, SLURMGraph, SGE, SGEGraph, PBS, PBSGraph, LSF, Condor, ...)")


def _add_bids_selection(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("images")
    g.add_argument("--participant-label", nargs="+", default=[], metavar="LABEL",
                   help="participants to process (with or without 'sub-'; default: all)")
    g.add_argument("--session-label", nargs="+", default=[], metavar="LABEL", help="sessions")
    g.add_argument("--datatype", nargs="+", default=[], metavar="TYPE",
                   help="datatypes (default: anat func dwi fmap perf)")
    g.add_argument("--suffix", nargs="+", default=[], metavar="SUFFIX", help="suffixes (T1w, bold, ...)")
    g.add_argument("--task", nargs="+", default=[], metavar="TASK", help="tasks")
    g = p.add_argument_group("scanners")
    g.add_argument("--site-config", help="site configuration (nl_unwarp-site JSON, see docs/site-config.md)")
    g.add_argument("--coil", help="coil model used for every image instead of the site configuration's")
    g.add_argument("--isocenter-offset", nargs=3, type=float, metavar=("DX", "DY", "DZ"),
                   help="device coordinates (mm) of the world origin for every image; overrides "
                        "TablePosition")


def build_bids_app_parser() -> argparse.ArgumentParser:
    """``nl-unwarp BIDS_DIR OUTPUT_DIR participant [options]`` (BIDS-App convention)."""
    p = argparse.ArgumentParser(
        prog=f"{PROG} BIDS_DIR OUTPUT_DIR participant",
        description="Correct a BIDS dataset for gradient nonlinearity into a derivatives dataset. "
                    + CAUTION)
    p.add_argument("bids_dir", help="BIDS dataset (read only)")
    p.add_argument("output_dir", help="derivatives dataset to write (outside the input dataset)")
    p.add_argument("analysis_level", choices=["participant"], help="participant: one image at a time")
    p.add_argument("--quiet", action="store_true", help="no progress messages")
    _add_bids_selection(p)
    g = p.add_argument_group("correction")
    g.add_argument("--order", type=int, choices=ORDERS, default=3, help="B-spline order (default: 3)")
    g.add_argument("--no-jacobian", action="store_true", help="do not multiply by the Jacobian determinant")
    g.add_argument("--emit-warp-for-skipped", action="store_true",
                   help="write the field and Jacobian map also for images the scanner corrected in 3D")
    g.add_argument("--field-spacing", type=float, metavar="MM",
                   help="voxel size of the field files' grids, mm (default: each image's voxels); "
                        "the images are resampled through those files, read trilinearly")
    g = p.add_argument_group("execution")
    g.add_argument("-w", "--work-dir", help="nipype work directory (cache; default: beside OUTPUT_DIR)")
    g.add_argument("--plugin", default="MultiProc", help=PLUGINS_HELP)
    g.add_argument("--plugin-args", default="{}",
                   help="plugin arguments as JSON, e.g. '{\"sbatch_args\": \"-p short\"}', or @FILE")
    g.add_argument("--nprocs", type=int, help="MultiProc processes (default: all cores)")
    g.add_argument("--omp-nthreads", type=int, help="threads per process")
    return p


def _bids_options(args):
    from .bids.app import RunOptions

    return RunOptions(
        bids_dir=Path(args.bids_dir), output_dir=Path(args.output_dir) if getattr(args, "output_dir", None)
        else None, site_config=Path(args.site_config) if args.site_config else None,
        coil_override=Path(args.coil) if args.coil else None, participants=args.participant_label,
        sessions=args.session_label, datatypes=args.datatype, suffixes=args.suffix, tasks=args.task,
        isocenter_offset_mm=tuple(args.isocenter_offset) if args.isocenter_offset else None)


def _plugin_args(text: str) -> dict:
    if text.startswith("@"):
        text = Path(text[1:]).read_text(encoding="utf-8")
    try:
        value = json.loads(text)
    except ValueError as exc:
        raise InputError("--plugin-args", f"not valid JSON ({exc})") from None
    if not isinstance(value, dict):
        raise InputError("--plugin-args", "must be a JSON object")
    return value


def _print_run_rows(rows: list[dict]) -> None:
    width = max(len(r["image"]) for r in rows)
    print(f"{'image':{width}}  {'site':10}  {'decision':12}  max |d| (mm)")
    for r in rows:
        disp = "-" if r["displacement_max_mm"] is None else f"{r['displacement_max_mm']:.3f}"
        print(f"{r['image']:{width}}  {r['site'] or '-':10}  {r['decision']:12}  {disp:>12}")


def _cmd_plan(args, progress: _Progress) -> None:
    from .bids.app import build_plan
    from .bids.plan import format_table

    plan = build_plan(_bids_options(args))
    if args.json:
        print(json.dumps([{"image": r.relpath, "status": r.status, "problem": r.problem,
                           "decision": r.decision.as_record() if r.decision else None}
                          for r in plan.rows], indent=2))
    else:
        print(format_table(plan))
    if plan.problems:
        raise InputError(args.bids_dir, f"{len(plan.problems)} image(s) with problems (see the table)")


def _cmd_bids_app(args, progress: _Progress) -> None:
    from .bids.app import build_plan, run

    options = _bids_options(args)
    options.work_dir = Path(args.work_dir) if args.work_dir else None
    options.plugin, options.plugin_args = args.plugin, _plugin_args(args.plugin_args)
    options.n_procs, options.omp_nthreads = args.nprocs, args.omp_nthreads
    options.order, options.jacobian = args.order, not args.no_jacobian
    options.emit_warp_for_skipped = args.emit_warp_for_skipped
    options.field_spacing_mm = args.field_spacing
    options.progress = progress.nodes
    progress.step(f"indexing {args.bids_dir} and deciding per image")
    plan = build_plan(options)
    progress.step(f"running {len(plan.rows)} image(s) with the {options.plugin} plugin")
    try:
        rows, failures = run(options, plan=plan)
    finally:
        progress.end_nodes()
    _print_run_rows(rows)
    print(f"report           {Path(args.output_dir) / 'reports' / 'index.html'}")
    if failures:
        raise InputError(args.output_dir, f"{len(failures)} step(s) crashed (first: {failures[0]}); "
                                          "finished derivatives were kept: re-run the same command "
                                          "to complete the rest")
    print(CAUTION)


def _cmd_compose(args, progress: _Progress) -> None:
    from .io.atomic import OutputSet

    if bool(args.source) != bool(args.out_image):
        raise InputError("--source/--out-image", "give both: the raw image and where to write it resampled")
    if not (args.out_image or args.out_field or args.out_composite or args.out_factor):
        raise InputError("compose", "nothing to write: give --out-image, --out-field, --out-factor "
                                    "or --out-composite")
    with OutputSet() as sink:  # the image and the transforms appear together or not at all
        _compose_outputs(args, progress, sink)
    for path in (args.out_image, args.out_field, args.out_factor, args.out_composite):
        if path:
            print(f"wrote            {path}")


def _compose_outputs(args, progress: _Progress, sink) -> None:
    from .interfaces.compose import compose_transform_files, resample_once_file

    if args.out_image:
        progress.step(f"resampling {args.source} once through {len(args.transforms)} transform file(s)")
        once = resample_once_file(args.source, args.transforms, args.out_image, reference=args.reference,
                                  jacobian_map=args.jacobian_map, order=args.order, fill=args.fill,
                                  on_outside=args.on_outside, sink=sink)
        print(f"resampled once   {once['volumes']} volume(s); uncovered "
              f"{100 * once['uncovered_fraction']:.2f} % of the reference grid")
    if args.out_field or args.out_composite or args.out_factor:
        progress.step(f"composing {len(args.transforms)} transform file(s) onto the grid of "
                      f"{args.reference}")
        summary = compose_transform_files(args.transforms, args.reference, out_field=args.out_field,
                                          out_composite=args.out_composite, out_factor=args.out_factor,
                                          raw=args.raw or args.source, jacobian_map=args.jacobian_map,
                                          on_outside=args.on_outside, sink=sink)
        print(f"chain            {' -> '.join(summary['steps'])} (first applied first to a reference "
              "point)")
        if "max_displacement_mm" in summary:
            print(f"displacement     max {summary['max_displacement_mm']:.3f} mm; uncovered "
                  f"{100 * summary['uncovered_fraction']:.2f} % of the reference grid")


COMMANDS = {"warp": _cmd_warp, "correct": _cmd_correct, "describe": _cmd_describe,
            "import": _cmd_import, "demo": _cmd_demo, "plan": _cmd_plan}
COMMANDS["compose"] = _cmd_compose


def _report_scratch(args):
    """The warp outputs, with scratch field, Jacobian and magnitude maps when a report needs them.

    Scratch maps are uncompressed ``.nii``: they are read back at once, and gzip would
    cost more than the report itself.
    """
    import contextlib
    import tempfile

    outputs = _warp_outputs(args)
    if not getattr(args, "report", None) or (outputs.field and outputs.jacobian and outputs.magnitude):
        return contextlib.nullcontext(outputs)

    @contextlib.contextmanager
    def scratch():
        with tempfile.TemporaryDirectory(prefix="nl_unwarp_report_") as tmp:
            outputs.field = outputs.field or str(Path(tmp) / "field.nii")
            outputs.jacobian = outputs.jacobian or str(Path(tmp) / "jacobian.nii")
            outputs.magnitude = outputs.magnitude or str(Path(tmp) / "magnitude.nii")
            yield outputs

    return scratch()


def _add_report_parser(sub) -> None:
    p = sub.add_parser("report", help="write an HTML quality report: of an image, or of a coil model")
    kinds = p.add_subparsers(dest="report_kind", required=True, metavar="KIND")
    q = kinds.add_parser("coil", help="a coil model page: displacement maps and the radius table")
    q.add_argument("coil", help="coil model file")
    q.add_argument("--out", required=True, metavar="HTML", help="page to write")
    q = kinds.add_parser("image", help="an image's page, from the image and its warp products")
    q.add_argument("raw", help="raw (distorted) image")
    q.add_argument("--summary", required=True, help="warp summary JSON (--out-summary of warp/correct)")
    q.add_argument("--field", required=True, help="ITK displacement field (--out-field)")
    q.add_argument("--jacobian", help="Jacobian map (--out-jacobian)")
    q.add_argument("--corrected", help="corrected image, for the before/after comparison")
    q.add_argument("--coil", help="coil model file: also write its page beside the report")
    q.add_argument("--out", required=True, metavar="HTML", help="page to write")


def _cmd_report(args, progress: _Progress) -> None:
    from .report.files import write_coil_page, write_correction_report

    progress.step(f"writing the {args.report_kind} report")
    if args.report_kind == "coil":
        print(f"report           {write_coil_page(args.coil, args.out)}")
        return
    pages = write_correction_report(args.out, raw_file=args.raw, corrected_file=args.corrected,
                                    summary=args.summary, field_file=args.field,
                                    jacobian_file=args.jacobian, coil_file=args.coil)
    print(f"report           {pages[0]}" + (f" (coil model page {pages[1].name})" if len(pages) > 1 else ""))


COMMANDS["report"] = _cmd_report


def _add_dwi_parser(sub) -> None:
    p = sub.add_parser("dwi", help="diffusion: coil tensor, effective b-values and b-vectors of a DWI",
                       description="Compute the gradient coil tensor L on a DWI's grid, in the frame of "
                                   "its bvec file, and what the nonlinear gradients did to its b-table: "
                                   "b_eff = b |L g|^2, g_eff = L g / |L g| (per voxel).")
    p.add_argument("dwi", help="DWI series (only its header and b=0 volumes are read)")
    p.add_argument("--bval", required=True, help="BIDS/FSL .bval file")
    p.add_argument("--bvec", required=True, help="BIDS/FSL .bvec file (image-axes frame)")
    p.add_argument("--coil", required=True, help="coil model file (nl_unwarp-coil JSON)")
    p.add_argument("--mask", help="brain mask on the DWI grid (default: from the mean b=0 image)")
    _add_frame_options(p)
    g = p.add_argument_group("diffusion products")
    g.add_argument("--out-tensor", help="coil tensor, NIfTI (X, Y, Z, 1, 9) with a JSON sidecar beside it")
    g.add_argument("--out-deviation", help="b-value deviation b_eff/b - 1, one volume per shell")
    g.add_argument("--out-summary", help="summary JSON (per shell: median and extremes in the mask)")
    g.add_argument("--out-mean-bval", help="one effective b-table for the mask: .bval")
    g.add_argument("--out-mean-bvec", help="one effective b-table for the mask: .bvec")
    g.add_argument("--out-voxel-bvals", help="per-voxel b-values (X, Y, Z, N); use .nii for speed")
    g.add_argument("--out-voxel-bvecs", help="per-voxel b-vectors (X, Y, Z, N, 3); large")


def _cmd_dwi(args, progress: _Progress) -> None:
    from .interfaces.diffusion import diffusion_weighting_files

    if args.mode != "full":
        raise InputError("--mode", "the diffusion weighting takes the full coil tensor; drop --mode")
    progress.step(f"computing the coil tensor on the grid of {args.dwi}")
    s = diffusion_weighting_files(
        args.dwi, args.bval, args.bvec, args.coil, frame=_frame_spec(args), mask=args.mask,
        out_tensor=args.out_tensor, out_deviation=args.out_deviation, out_summary=args.out_summary,
        out_mean_bval=args.out_mean_bval, out_mean_bvec=args.out_mean_bvec,
        out_voxel_bvals=args.out_voxel_bvals, out_voxel_bvecs=args.out_voxel_bvecs)
    print(f"coil model       {s['coil_model']['label']} (sha256 {str(s['coil_model']['sha256'])[:12]})")
    print(f"position         {s['patient_position']}; isocenter at RAS "
          f"{', '.join(f'{v:.1f}' for v in s['isocenter_ras_mm'])} mm ({s['isocenter_offset_from']})")
    print(f"mask             {s['mask_voxels']} voxels, {s['mask']}")
    print("shell (s/mm2)  median dev.   min dev.   max dev.")
    for sh in s["shells"]:
        print(f"{sh['bval']:13.0f}  {100 * sh['median_deviation']:9.2f} %  "
              f"{100 * sh['min_deviation']:7.2f} %  "
              f"{100 * sh['max_deviation']:7.2f} %")
    print(f"apparent MD      x{s['apparent_md_ratio_min']:.4f} .. x{s['apparent_md_ratio_max']:.4f} "
          "with the nominal table (isotropic medium)")
    for path in (args.out_tensor, args.out_deviation, args.out_summary, args.out_mean_bval,
                 args.out_mean_bvec, args.out_voxel_bvals, args.out_voxel_bvecs):
        if path:
            print(f"wrote            {path}")


COMMANDS["dwi"] = _cmd_dwi


# Coil models from measurements: ``nl-unwarp fit KIND``. Each kind adds its parser in
# _add_fit_parser and its function to FIT_KINDS.


def _add_fit_parser(sub) -> None:
    p = sub.add_parser("fit", help="make a coil model file from measurements (field samples, ...)",
                       description="Fit a coil model to measurements of the gradient system. " + CAUTION)
    kinds = p.add_subparsers(dest="fit_kind", required=True, metavar="KIND")
    _add_fit_samples_parser(kinds)
    from .cli_phantom import add_fit_phantom_parser

    add_fit_phantom_parser(kinds, _add_frame_options)


def _add_fit_samples_parser(kinds) -> None:
    q = kinds.add_parser(
        "samples", help="from field samples of each gradient coil (TSV tables or NIfTI field maps)",
        description="Least-squares fit of solid harmonics to field samples of the x, y and z coils. "
                    "A table has columns x_mm, y_mm, z_mm (device frame) and bz_mT; a NIfTI map holds "
                    "bz_mT, its affine read as device-frame mm unless --position, --table-position or "
                    "--isocenter-offset is given (then it is world RAS). See docs/fitting.md. " + CAUTION)
    for axis in ("x", "y", "z"):
        q.add_argument(f"--{axis}", required=True, metavar="FILE", dest=f"{axis}_samples",
                       help=f"field samples of the {axis} coil (.tsv/.txt table or .nii[.gz] map)")
    q.add_argument("--gradient-mT-per-m", type=float, nargs="+", metavar="G",
                   help="nominal gradient(s), mT/m: one for all coils or three (x y z); default: the "
                        "'# gradient_mT_per_m:' line of each table")
    q.add_argument("--degree", default="auto", metavar="N|auto",
                   help="harmonic degree, or auto: held-out (leave-one-out) cross-validation (default)")
    q.add_argument("--max-degree", type=int, default=15, metavar="N",
                   help="highest degree tried with --degree auto (default: 15)")
    q.add_argument("--symmetry", choices=("none", "mirror", "axial"), default="none",
                   help="leave out the terms a symmetric coil design forbids: mirror (each coil mirror-"
                        "symmetric in the planes x=0, y=0, z=0) or axial (also an axially symmetric z "
                        "coil); default: none")
    q.add_argument("--reference-radius-mm", type=float, help="R0 of the model (default: the sampled radius)")
    q.add_argument("--valid-radius-mm", type=float,
                   help="valid radius written to the model (default: the radius the samples cover)")
    g = q.add_argument_group("NIfTI field maps: world frame of the affine")
    g.add_argument("--position", type=str.upper, choices=sorted(PATIENT_POSITIONS),
                   help="read the affines as world RAS of a patient in this DICOM PatientPosition")
    g.add_argument("--table-position", nargs=3, type=float, metavar=("TP1", "TP2", "TP3"),
                   help="BIDS TablePosition, mm (affines read as world RAS)")
    g.add_argument("--isocenter-offset", nargs=3, type=float, metavar=("DX", "DY", "DZ"),
                   help="device coordinates (mm) of the world origin (affines read as world RAS)")
    g = q.add_argument_group("outputs and provenance")
    g.add_argument("--out", required=True, metavar="JSON", help="coil model file to write")
    g.add_argument("--out-summary", metavar="JSON", help="fit summary: residuals, predicted error, warnings")
    g.add_argument("--report", metavar="DIR", help="folder for the fit's report page and the coil model page")
    g.add_argument("--label", default="fitted from field samples", help="label of the coil model")
    g.add_argument("--description", default="", help="free-text provenance")
    g.add_argument("--date", help="provenance date, ISO 8601 (default: today, UTC)")


def _fit_degree(text: str) -> int | None:
    if text.strip().lower() == "auto":
        return None
    try:
        value = int(text)
    except ValueError:
        raise InputError("--degree", f"{text!r} is neither a whole number nor auto") from None
    if not 1 <= value <= 60:
        raise InputError("--degree", f"degree {value} out of range (1..60)")
    return value


def _cmd_fit_samples(args, progress: _Progress) -> None:
    from .interfaces.fit import FIT_PAGE_NAME, fit_field_sample_files

    progress.step("reading field samples and fitting")
    s = fit_field_sample_files(
        {"x": args.x_samples, "y": args.y_samples, "z": args.z_samples}, args.out,
        gradient_mT_per_m=args.gradient_mT_per_m, degree=_fit_degree(args.degree),
        max_degree=args.max_degree, symmetry=args.symmetry, reference_radius_mm=args.reference_radius_mm,
        valid_radius_mm=args.valid_radius_mm, position=args.position,
        table_position_mm=args.table_position, isocenter_offset_mm=args.isocenter_offset,
        label=args.label, description=args.description, date=args.date, out_summary=args.out_summary,
        report_dir=args.report)
    def num(value, spec: str) -> str:
        return "n/a" if value is None else format(value, spec)

    print(f"degree           {s['degree_choice']}; symmetry {s['symmetry']}")
    print("axis  degree  samples   rms (mm)   max (mm)  held-out rms (mm)  condition")
    for name, a in s["axes"].items():
        print(f"{name:4}  {a['degree']:6d}  {a['samples']:7d}  {num(a['residual_rms_mm'], '9.4f')}  "
              f"{num(a['residual_max_mm'], '9.4f')}  {num(a['cv_rms_mm'], '17.4f')}  "
              f"{num(a['condition_number'], '9.3g')}")
    err, growth = s["predicted_error_max_mm"], s["growth_exponent"]
    print(f"valid radius     {s['valid_radius_mm']:.1f} mm (samples cover {s['sampled_radius_mm']:.1f} mm)")
    print("predicted error  " + ("unknown" if err is None else
                                 f"max {err:.4f} mm inside the valid radius"
                                 + ("" if growth is None else f"; grows as r^{growth:.1f} outside")))
    for w in s["warnings"]:
        print(f"warning          {w['axis'] or 'all'}: {w['code']}: {w['message']}")
    print(f"wrote            {args.out}")
    if args.report:
        print(f"report           {Path(args.report) / FIT_PAGE_NAME}")
    print(CAUTION)


FIT_KINDS = {"samples": _cmd_fit_samples}


def _cmd_fit_phantom(args, progress: _Progress) -> None:
    from .cli_phantom import run_fit_phantom

    run_fit_phantom(args, progress)


FIT_KINDS["phantom"] = _cmd_fit_phantom


def _cmd_fit(args, progress: _Progress) -> None:
    FIT_KINDS[args.fit_kind](args, progress)


COMMANDS["fit"] = _cmd_fit


def main(argv: list[str] | None = None) -> int:
    """Run the CLI; returns the exit code."""
    argv = sys.argv[1:] if argv is None else list(argv)
    # BIDS-App convention: the first positional is a dataset, not a subcommand.
    bids_app = bool(argv) and not argv[0].startswith("-") and argv[0] not in COMMANDS
    args = build_bids_app_parser().parse_args(argv) if bids_app else build_parser().parse_args(argv)
    logging.basicConfig(format=f"{PROG}: warning: %(message)s", level=logging.WARNING)
    progress = _Progress(args.quiet)
    try:
        (_cmd_bids_app if bids_app else COMMANDS[args.command])(args, progress)
    except InputError as exc:
        # One line, whatever a wrapped library put in the message (nibabel's have newlines).
        print(f"{PROG}: error: {' '.join(str(exc).split())}", file=sys.stderr)
        return 1
    except OSError as exc:
        # A full disk, a folder that is a file, no permission: the system names the path.
        # Outputs are complete-or-nothing (OutputSet), so nothing half-written is left.
        where = exc.filename if exc.filename is not None else "output"
        print(f"{PROG}: error: {where}: {exc.strerror or exc}", file=sys.stderr)
        return 1
    except MemoryError:
        print(f"{PROG}: error: out of memory", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted; no output was left half-written", file=sys.stderr)
        return 1
    progress.step("done")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
