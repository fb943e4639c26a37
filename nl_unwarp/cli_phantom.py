"""Command line kind ``nl-unwarp fit phantom``: a coil model from phantom scans.

Parses and calls :func:`nl_unwarp.interfaces.phantom.fit_phantom_files`; no
physics here. Wired into the ``fit`` group of :mod:`nl_unwarp.cli`.
"""

from __future__ import annotations

import argparse
from collections.abc import Callable

from .errors import InputError

__all__ = ["add_fit_phantom_parser", "run_fit_phantom"]

CAUTION = ("For research pipelines only: not for diagnosis. Defer to your local scanner QA and "
           "licensed practice.")


def add_fit_phantom_parser(kinds, add_frame_options: Callable[[argparse.ArgumentParser], None]) -> None:
    """Add the ``phantom`` kind to the ``fit`` group's subparsers."""
    q = kinds.add_parser(
        "phantom", help="from 3-D scans of a phantom with fiducial markers",
        description="Detect the markers of a phantom (definition: docs/phantom-format.md) in one or more "
                    "3-D scans, match them to the definition, and fit jointly the phantom's pose and the "
                    "coil model's terms of degree 2..N (robust loss; standard errors from the Jacobian). "
                    "Several scans at different table positions are combined in one fit (the phantom "
                    "stays on the table). " + CAUTION)
    q.add_argument("images", nargs="+", metavar="IMAGE", help="3-D phantom scan(s), NIfTI")
    q.add_argument("--phantom", required=True, metavar="JSON", help="phantom definition file")
    q.add_argument("--degree", type=int, default=7, metavar="N",
                   help="highest harmonic degree fitted, 2..9 (default: 7)")
    q.add_argument("--symmetry", choices=("none", "mirror", "axial"), default="none",
                   help="leave out the terms a symmetric coil design forbids (default: none)")
    q.add_argument("--fit-isocenter-offset", action="store_true",
                   help="also fit a correction common to every scan's isocenter offset (needs --symmetry "
                        "mirror or axial: without it the offset is not determined)")
    q.add_argument("--loss-scale-mm", type=float, metavar="MM",
                   help="residual scale of the robust (soft L1) loss, mm (default: three robust "
                        "standard deviations of the residuals of a first least-squares fit)")
    q.add_argument("--phantom-rotation", nargs=3, type=float, metavar=("RX", "RY", "RZ"),
                   help="rough rotation of the phantom in world RAS, degrees about x, then y, then z "
                        "(default: its axes roughly along the world's; matching tries the 24 "
                        "axis-aligned turns about it and needs to start within a few degrees)")
    q.add_argument("--scan-table-position", nargs=3, type=float, action="append",
                   metavar=("TP1", "TP2", "TP3"),
                   help="BIDS TablePosition of one scan, mm; repeat once per IMAGE, in order")
    add_frame_options(q)
    g = q.add_argument_group("outputs and provenance")
    g.add_argument("--out", required=True, metavar="JSON", help="coil model file to write")
    g.add_argument("--report", metavar="DIR", help="folder for the fit's report page and the coil model page")
    g.add_argument("--markers-tsv", metavar="TSV", help="per-marker residual table to write")
    g.add_argument("--out-summary", metavar="JSON", help="fit summary to write")
    g.add_argument("--label", help="label of the coil model (default: from the phantom's name)")
    g.add_argument("--date", help="provenance date written to the model, ISO 8601")


def _table_positions(args):
    if args.scan_table_position and args.table_position:
        raise InputError("--scan-table-position", "give --table-position (all scans) or "
                                                  "--scan-table-position (one per image), not both")
    if args.scan_table_position:
        if len(args.scan_table_position) != len(args.images):
            raise InputError("--scan-table-position", f"given {len(args.scan_table_position)} times for "
                                                      f"{len(args.images)} images: give one per image")
        return args.scan_table_position
    return [args.table_position] if args.table_position else None


def run_fit_phantom(args, progress) -> None:
    """Run ``nl-unwarp fit phantom``."""
    from .interfaces.phantom import fit_phantom_files

    if args.mode != "full" or args.slice_axis is not None:
        raise InputError("--mode/--slice-axis", "a phantom fit uses the full 3-D encoding; drop them")
    if args.loss_scale_mm is not None and not args.loss_scale_mm > 0:
        raise InputError("--loss-scale-mm", f"must be a positive number of mm, got {args.loss_scale_mm}")
    tables = _table_positions(args)
    offsets = [args.isocenter_offset] if args.isocenter_offset else None
    if offsets is not None:
        tables = None
    s = fit_phantom_files(args.images, args.phantom, args.out, degree=args.degree, position=args.position,
                          table_positions=tables, isocenter_offsets=offsets, symmetry=args.symmetry,
                          fit_isocenter_offset=args.fit_isocenter_offset, loss_scale_mm=args.loss_scale_mm,
                          report_dir=args.report, markers_tsv=args.markers_tsv, label=args.label,
                          date=args.date, step=progress.step, out_summary=args.out_summary,
                          phantom_rotation_deg=args.phantom_rotation)
    print(f"phantom          {s['phantom']}")
    print("scan                          detected  matched  missing  spurious  rms (mm)")
    for scan in s["scans"]:
        print(f"{scan['label'][:28]:28}  {scan['detected']:8d}  {scan['matched']:7d}  {scan['missing']:7d}  "
              f"{scan['spurious']:8d}  {scan['residual_rms_mm']:8.4f}")
    print(f"fit              degree {s['degree']}, symmetry {s['symmetry']}, {s['markers']} markers, "
          f"{s['outliers']} outliers")
    print(f"residual         rms {s['residual_rms_mm']:.4f} mm, max {s['residual_max_mm']:.4f} mm "
          f"(rigid pose alone: rms {s['rigid_residual_rms_mm']:.4f} mm)")
    pose = s["pose"]
    print(f"pose             translation {', '.join(f'{v:.3f}' for v in pose['translation_ras_mm'])} mm "
          f"(RAS), rotation {pose['rotation_angle_deg']:.4f} deg")
    if s["isocenter_correction_mm"] is not None:
        print(f"isocenter corr.  {', '.join(f'{v:.3f}' for v in s['isocenter_correction_mm'])} mm (device) "
              f"+- {', '.join(f'{v:.3f}' for v in s['isocenter_correction_sigma_mm'])}")
    print(f"valid radius     {s['valid_radius_mm']:.1f} mm")
    for path in (s["coil"], s["markers_tsv"], s["report"], args.out_summary):
        if path:
            print(f"wrote            {path}")
    print(CAUTION)
