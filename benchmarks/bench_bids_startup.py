#!/usr/bin/env python
"""Startup of a participant-level run on a 100-subject dataset: indexing, planning, building.

Generates the invented two-site dataset (50 subjects per site, 4 images per
session, sub-01 with a second session: 404 images, undistorted content so that
generation is quick), then times, separately and in a fresh process each
figure is meaningful for:

* pybids indexing (``BIDSLayout``, metadata included),
* planning (sidecar inheritance, scanner rules, decisions, headers),
* the nipype workflow build (one branch per image and a sink).

Target: indexing + planning + build under 30 s on the project machine (2 cores).
Nothing here is asserted: it prints the figures.

Usage: python benchmarks/bench_bids_startup.py [--subjects-per-site N] [--keep DIR]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

os.environ.setdefault("NIPYPE_NO_ET", "1")

TARGET_S = 30.0


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--subjects-per-site", type=int, default=50)
    parser.add_argument("--keep", type=Path, help="folder to generate into (kept)")
    args = parser.parse_args()
    from nl_unwarp.bids import demodata
    from nl_unwarp.bids.plan import index_dataset, make_plan
    from nl_unwarp.bids.siteconfig import load_site_config
    from nl_unwarp.workflows.bids import init_bids_unwarp_wf

    base = args.keep or Path(tempfile.mkdtemp(prefix="nlu_bench_"))
    t0 = time.perf_counter()
    root = demodata.make_dataset(base / "rawdata", subjects_per_site=args.subjects_per_site,
                                 simulate=False)
    demodata.write_coils(base / "coils")
    os.environ[demodata.COIL_DIR_VARIABLE] = str(base / "coils")
    config_path = demodata.write_site_config(base / "sites.json")
    t_gen = time.perf_counter() - t0

    t0 = time.perf_counter()
    layout = index_dataset(root)
    t_index = time.perf_counter() - t0
    t0 = time.perf_counter()
    plan = make_plan(layout, load_site_config(config_path))
    t_plan = time.perf_counter() - t0
    plan.raise_problems()
    t0 = time.perf_counter()
    workflow = init_bids_unwarp_wf(plan=plan, output_dir=base / "derivatives", site_config=config_path)
    nodes = len(workflow.list_node_names())
    t_build = time.perf_counter() - t0
    total = t_index + t_plan + t_build
    print(f"subjects {2 * args.subjects_per_site}, images {len(plan.rows)}, workflow nodes {nodes}")
    print(f"generation (not counted)   {t_gen:7.2f} s")
    print(f"pybids indexing            {t_index:7.2f} s")
    print(f"planning (decisions)       {t_plan:7.2f} s")
    print(f"workflow build             {t_build:7.2f} s")
    print(f"startup total              {total:7.2f} s   (target < {TARGET_S:g} s: "
          f"{'met' if total < TARGET_S else 'NOT met'})")


if __name__ == "__main__":
    main()
