#!/usr/bin/env python
"""Multi-site BIDS run: correct every image of a dataset for gradient nonlinearity.

Built from the package's factories, step by step, so it can be adapted:

1. index the dataset and decide per image from the sidecars and the site
   configuration (:func:`nl_unwarp.bids.app.build_plan`);
2. build one :func:`nl_unwarp.workflows.unwarp.init_unwarp_wf` per image with a
   derivatives sink (:func:`nl_unwarp.workflows.bids.init_bids_unwarp_wf`);
3. run it with any nipype plugin (MultiProc here; SLURM, SGE, PBS... with
   ``--plugin``), so that cluster users submit through their own scheduler.

Usage::

    NLU_COIL_DIR=/secure/coils python workflows/multisite_bids.py BIDS_DIR OUTPUT_DIR \\
        --site-config sites.json [--work-dir WORK] \\
        [--plugin SLURM --plugin-args '{"sbatch_args": "-p short"}']

Without BIDS_DIR (``--demo FOLDER``) it generates the invented two-site dataset first.
For research pipelines only: not for diagnosis.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path


def build(bids_dir: Path, output_dir: Path, site_config: Path, work_dir: Path, **options):
    """Plan and build the workflow; returns (plan, workflow) without running anything."""
    from nl_unwarp.bids.app import RunOptions, build_plan
    from nl_unwarp.workflows.bids import init_bids_unwarp_wf

    plan = build_plan(RunOptions(bids_dir=bids_dir, output_dir=output_dir, site_config=site_config,
                                 work_dir=work_dir))
    plan.raise_problems()
    workflow = init_bids_unwarp_wf(plan=plan, output_dir=output_dir, site_config=site_config, **options)
    workflow.base_dir = str(work_dir)
    return plan, workflow


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("bids_dir", nargs="?", type=Path)
    parser.add_argument("output_dir", nargs="?", type=Path)
    parser.add_argument("--site-config", type=Path)
    parser.add_argument("--work-dir", type=Path)
    parser.add_argument("--plugin", default="MultiProc")
    parser.add_argument("--plugin-args", default='{"n_procs": 2, "mp_context": "forkserver"}')
    parser.add_argument("--demo", type=Path, help="generate the invented dataset in this folder and run it")
    args = parser.parse_args(argv)
    if args.demo:
        import os

        from nl_unwarp.bids import demodata

        args.bids_dir = demodata.make_dataset(args.demo / "rawdata")
        demodata.write_coils(args.demo / "coils")
        os.environ.setdefault(demodata.COIL_DIR_VARIABLE, str((args.demo / "coils").resolve()))
        args.site_config = demodata.write_site_config(args.demo / "sites.json")
        args.output_dir = args.output_dir or args.demo / "derivatives"
    if not (args.bids_dir and args.output_dir and args.site_config):
        parser.error("give BIDS_DIR OUTPUT_DIR --site-config, or --demo FOLDER")
    from nl_unwarp.bids.app import summary_rows
    from nl_unwarp.bids.derivatives import ensure_dataset
    from nl_unwarp.io.lock import folder_lock

    work_dir = args.work_dir or args.output_dir.parent / "nl_unwarp_work"
    plan, workflow = build(args.bids_dir, args.output_dir, args.site_config, work_dir)
    with folder_lock(args.output_dir):  # other runs may share the output folder
        ensure_dataset(args.output_dir, args.bids_dir)
    workflow.run(plugin=args.plugin, plugin_args=json.loads(args.plugin_args))
    for row in summary_rows(plan, args.output_dir):
        disp = "-" if row["displacement_max_mm"] is None else f"{row['displacement_max_mm']:.3f} mm"
        print(f"{row['image']}  {row['decision']}  {disp}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
