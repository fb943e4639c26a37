#!/usr/bin/env python
"""Load: 50 generated subjects through the BIDS-App with MultiProc (2 processes).

Generates the invented two-site dataset (25 subjects per site, 4 images per session:
T1w, 2D T2w, bold, dwi; the Southbay T1w is corrected by its scanner in 3D and skipped),
then runs ``nl-unwarp BIDS_DIR OUT participant --plugin MultiProc --nprocs 2`` in a child
process, as a user would, with a fresh work folder (no cache), and prints:

* throughput: subjects per minute and images per minute (corrected images, wall time of
  the whole command: indexing, planning, the pipeline, the reports);
* peak resident memory of every process of the run (the command, which runs nipype's
  scheduler and the in-process nodes, the forkserver, nipype's worker processes): ``VmHWM``
  from ``/proc/PID/status``, the kernel's own high-water mark of each process, read every
  0.25 s while it lives (the last value read is the peak up to then; a process living
  less than 0.25 s may be missed);
* the same-run peer: the Linear plugin on the first subjects only (a subset, to keep the
  run short), its throughput, and the ratio MultiProc / Linear in subjects per minute.
  Both include the command's fixed start-up; on a subset it weighs more, which favours
  MultiProc's ratio a little: the subset's own MultiProc figure is printed too when
  ``--peer-both`` is given.

Nothing is asserted: it prints the figures. Both commands index the whole dataset (pybids),
so that cost is the same in both. On the project machine (2 cores shared with other work)
the ratio MultiProc / Linear was 0.91; it can reach about 2 only on two idle cores, since the
scheduler and the sinks run in the main process (figures in benchmarks/README.md).

Usage: python benchmarks/bench_load.py [--quick] [--subjects 50] [--linear-subjects 6]
       [--nprocs 2] [--peer-both] [--keep DIR]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("NIPYPE_NO_ET", "1")

SAMPLE_S = 0.25
KIB_PER_MIB = 1024


def _children_map() -> dict[int, list[int]]:
    """Parent pid -> child pids of every process visible in /proc."""
    children: dict[int, list[int]] = {}
    for entry in os.scandir("/proc"):
        if not entry.name.isdigit():
            continue
        try:
            with open(f"/proc/{entry.name}/stat", encoding="ascii", errors="replace") as f:
                stat = f.read()
        except OSError:
            continue
        # The command name (field 2) is in parentheses and may hold spaces: split after it.
        ppid = int(stat[stat.rindex(")") + 2:].split()[1])
        children.setdefault(ppid, []).append(int(entry.name))
    return children


def _descendants(pid: int) -> list[int]:
    tree, found, todo = _children_map(), [], [pid]
    while todo:
        p = todo.pop()
        found.append(p)
        todo.extend(tree.get(p, []))
    return found


def _status_kib(pid: int, key: str) -> int | None:
    try:
        with open(f"/proc/{pid}/status", encoding="ascii") as f:
            for line in f:
                if line.startswith(key + ":"):
                    return int(line.split()[1])
    except OSError:
        return None
    return None


def _role(pid: int, main_pid: int, parents: dict[int, int], cmdlines: dict[int, str]) -> str:
    cmd = cmdlines.get(pid, "")
    if pid == main_pid:
        return "command (scheduler, in-process nodes)"
    if "resource_tracker" in cmd:
        return "resource tracker"
    if "forkserver" in cmd and parents.get(pid) == main_pid:
        return "forkserver"
    if "forkserver" in cmdlines.get(parents.get(pid, -1), "") or "forkserver" in cmd:
        return "worker"
    return cmd.split(" ")[0] or "other"


def run_sampled(command: list[str], env: dict[str, str]) -> dict:
    """Run ``command``; wall time and the peak RSS of every process of its tree."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(command, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            text=True, start_new_session=True)
    peaks: dict[int, int] = {}
    parents: dict[int, int] = {}
    cmdlines: dict[int, str] = {}
    while proc.poll() is None:
        tree = _children_map()
        todo = [proc.pid]
        while todo:
            p = todo.pop()
            for child in tree.get(p, []):
                parents[child] = p
                todo.append(child)
            hwm = _status_kib(p, "VmHWM")
            if hwm is not None:
                peaks[p] = max(peaks.get(p, 0), hwm)
                if p not in cmdlines:
                    try:
                        raw = Path(f"/proc/{p}/cmdline").read_bytes()
                        cmdlines[p] = raw.replace(b"\0", b" ").decode(errors="replace").strip()
                    except OSError:
                        cmdlines[p] = ""
        time.sleep(SAMPLE_S)
    stderr = proc.stderr.read()
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        sys.exit(f"run failed ({proc.returncode}):\n{stderr[-4000:]}")
    roles = {p: _role(p, proc.pid, parents, cmdlines) for p in peaks}
    return {"wall_s": wall, "peaks_kib": peaks, "roles": roles}


def _command(root: Path, out: Path, work: Path, config: Path, plugin: list[str],
             subjects: list[str] | None) -> list[str]:
    cmd = [sys.executable, "-m", "nl_unwarp.cli", str(root), str(out), "participant", "-w", str(work),
           "--quiet", "--site-config", str(config), *plugin]
    if subjects:
        cmd += ["--participant-label", *subjects]
    return cmd


def _corrected_images(root: Path, config: Path, subjects: list[str] | None) -> tuple[int, int]:
    """(images with a correction, all selected images) from the plan (nothing computed)."""
    from nl_unwarp.bids.app import RunOptions, build_plan

    plan = build_plan(RunOptions(bids_dir=root, site_config=config, participants=subjects or []))
    return sum(r.decision.action != "skip" for r in plan.rows), len(plan.rows)


def _print_run(label: str, result: dict, n_subjects: int, n_images: int) -> float:
    minutes = result["wall_s"] / 60
    per_min = n_subjects / minutes
    print(f"{label}: {n_subjects} subjects, {n_images} corrected images in {result['wall_s']:.1f} s: "
          f"{per_min:.2f} subjects/min, {n_images / minutes:.2f} images/min")
    return per_min


def _print_memory(result: dict) -> None:
    print("  peak resident memory per process (VmHWM):")
    rows = sorted(result["peaks_kib"].items(), key=lambda kv: (result["roles"][kv[0]], kv[0]))
    for pid, kib in rows:
        print(f"    {result['roles'][pid]:40s} pid {pid:7d}  {kib / KIB_PER_MIB:8.1f} MiB")
    workers = [kib for pid, kib in rows if result["roles"][pid] == "worker"]
    if workers:
        print(f"  largest worker: {max(workers) / KIB_PER_MIB:.1f} MiB "
              f"over {len(workers)} worker process(es)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="smoke run: 4 subjects, Linear on 2")
    parser.add_argument("--subjects", type=int, default=50, help="subjects (even; half per site)")
    parser.add_argument("--linear-subjects", type=int, default=6, help="subjects of the Linear peer")
    parser.add_argument("--nprocs", type=int, default=2, help="MultiProc processes")
    parser.add_argument("--peer-both", action="store_true",
                        help="also run MultiProc on the Linear subset")
    parser.add_argument("--keep", type=Path, help="folder to work in (kept)")
    args = parser.parse_args()
    if args.quick:
        args.subjects, args.linear_subjects = 4, 2
    from nl_unwarp.bids import demodata

    base = args.keep or Path(tempfile.mkdtemp(prefix="nlu_load_"))
    t0 = time.perf_counter()
    root = demodata.make_dataset(base / "rawdata", subjects_per_site=max(1, args.subjects // 2),
                                 simulate=True, moved_table=False)
    demodata.write_coils(base / "coils")
    config = demodata.write_site_config(base / "sites.json")
    env = dict(os.environ, NIPYPE_NO_ET="1", **{demodata.COIL_DIR_VARIABLE: str(base / "coils")})
    os.environ[demodata.COIL_DIR_VARIABLE] = env[demodata.COIL_DIR_VARIABLE]
    subjects = sorted(p.name[4:] for p in root.glob("sub-*"))
    # The peer's subset: both sites alike (first subjects of each).
    half = max(1, args.linear_subjects // 2)
    per_site = len(subjects) // 2
    subset = subjects[:half] + subjects[per_site:per_site + half]
    print(f"generated {len(subjects)} subjects in {time.perf_counter() - t0:.1f} s into {base}")
    print(f"machine: {os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.2f}; "
          f"NUMBA_NUM_THREADS={os.environ.get('NUMBA_NUM_THREADS', 'default')}")

    n_all, _ = _corrected_images(root, config, None)
    n_sub, _ = _corrected_images(root, config, subset)
    multiproc = ["--plugin", "MultiProc", "--nprocs", str(args.nprocs)]

    mp = run_sampled(_command(root, base / "deriv_multiproc", base / "work_multiproc", config, multiproc,
                              None), env)
    mp_rate = _print_run(f"MultiProc ({args.nprocs} processes)", mp, len(subjects), n_all)
    _print_memory(mp)

    lin = run_sampled(_command(root, base / "deriv_linear", base / "work_linear", config,
                               ["--plugin", "Linear"], subset), env)
    lin_rate = _print_run("Linear (peer, subset)", lin, len(subset), n_sub)
    _print_memory(lin)
    print(f"ratio MultiProc / Linear throughput (subjects/min): {mp_rate / lin_rate:.2f}")
    if args.peer_both:
        mps = run_sampled(_command(root, base / "deriv_multiproc_subset", base / "work_multiproc_subset",
                                   config, multiproc, subset), env)
        mps_rate = _print_run(f"MultiProc ({args.nprocs} processes), the same subset", mps,
                              len(subset), n_sub)
        print(f"ratio MultiProc / Linear on the same subset: {mps_rate / lin_rate:.2f}")
    print(f"load average at the end {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
