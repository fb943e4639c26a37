"""BIDS-App runs through the command line in a child process, and derivatives compared file by file.

Used by the cluster, fault and reproducibility tests: each run is ``nl-unwarp BIDS_DIR OUT
participant ...`` as a user types it, in its own process (and process group), so plugins,
thread variables and environment start fresh for every run.
"""

from __future__ import annotations

import gzip
import os
import signal
import subprocess
import sys
from pathlib import Path

#: Names our writers give files before they are complete (nl_unwarp.io.atomic.OutputSet),
#: and the usual temporary-file marks; none may remain in a finished derivatives tree.
UNFINISHED_MARKS = (".partial", ".tmp", "~")

#: Seconds one small BIDS run may take before the child is killed (a hang, not a speed check).
RUN_TIMEOUT_S = 600


def cli_command(bids_dir: Path, out_dir: Path, work_dir: Path, *options: str,
                quiet: bool = True) -> list[str]:
    """The BIDS-App command line (options after the positionals, as the parser wants)."""
    return [sys.executable, "-m", "nl_unwarp.cli", str(bids_dir), str(out_dir), "participant",
            "-w", str(work_dir), *(["--quiet"] if quiet else []), *options]


def child_env(**changes: str | None) -> dict[str, str]:
    """This process's environment with ``changes`` (None removes a variable)."""
    env = dict(os.environ)
    env["NIPYPE_NO_ET"] = "1"
    for key, value in changes.items():
        if value is None:
            env.pop(key, None)
        else:
            env[key] = value
    return env


def die_with_parent() -> None:
    """In the child before exec: SIGKILL it if the test process dies (Linux prctl), so that
    not even a killed test run leaves a pipeline running; its workers exit with it."""
    try:
        import ctypes

        pr_set_pdeathsig = 1  # <linux/prctl.h>
        ctypes.CDLL(None, use_errno=True).prctl(pr_set_pdeathsig, signal.SIGKILL)
    except (OSError, AttributeError):  # not Linux: the process-group kill still applies
        pass


def start_cli(command: list[str], env: dict[str, str], **streams) -> subprocess.Popen:
    """Start the command in its own process group (and session), tied to this process."""
    return subprocess.Popen(command, env=env, start_new_session=True, preexec_fn=die_with_parent,
                            **streams)


def run_cli(command: list[str], env: dict[str, str] | None = None) -> subprocess.CompletedProcess:
    """Run the command to its end in a new process group; kill the group if it hangs."""
    proc = start_cli(command, env or child_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                     text=True)
    try:
        stdout, stderr = proc.communicate(timeout=RUN_TIMEOUT_S)
    except subprocess.TimeoutExpired:
        kill_group(proc)
        raise
    finally:
        kill_group(proc)
    return subprocess.CompletedProcess(command, proc.returncode, stdout, stderr)


def kill_group(proc: subprocess.Popen) -> None:
    """SIGKILL the child's whole process group (its nipype workers too) and reap the child."""
    try:
        os.killpg(proc.pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    proc.wait()


def group_alive(pgid: int) -> bool:
    """Whether any process of the group still exists (signal 0 only checks)."""
    try:
        os.killpg(pgid, 0)
    except ProcessLookupError:
        return False
    return True


def tree_files(root: Path) -> dict[str, Path]:
    """Every file under ``root`` by its relative path (hidden files included)."""
    return {p.relative_to(root).as_posix(): p for p in sorted(root.rglob("*")) if p.is_file()}


def unfinished_files(root: Path) -> list[str]:
    """Files or folders under ``root`` whose names mark them as temporary or incomplete."""
    return sorted(p.relative_to(root).as_posix() for p in root.rglob("*")
                  if any(mark in p.name for mark in UNFINISHED_MARKS))


def _nifti_bytes(path: Path) -> bytes:
    return gzip.decompress(path.read_bytes()) if path.name.endswith(".gz") else path.read_bytes()


def tree_differences(a: Path, b: Path) -> list[str]:
    """Every difference between two derivatives trees, compared byte for byte.

    Every file is compared whole: NIfTI images (header and data), ITK transform files,
    sidecar JSON, bval/bvec, TSV tables and the HTML reports. No field is excluded: the
    outputs hold no timestamps and no absolute paths other than the source dataset's URL,
    which is the same when the same dataset is processed. For a gzipped NIfTI that differs,
    the message says whether the uncompressed image (header + data) differs too or only the
    gzip wrapper.
    """
    files_a, files_b = tree_files(a), tree_files(b)
    problems = [f"only in {a.name}: {name}" for name in sorted(set(files_a) - set(files_b))]
    problems += [f"only in {b.name}: {name}" for name in sorted(set(files_b) - set(files_a))]
    for name in sorted(set(files_a) & set(files_b)):
        pa, pb = files_a[name], files_b[name]
        if pa.read_bytes() == pb.read_bytes():
            continue
        if name.endswith((".nii", ".nii.gz")):
            what = ("image bytes differ" if _nifti_bytes(pa) != _nifti_bytes(pb)
                    else "gzip wrapper differs, image bytes equal")
        else:
            what = "bytes differ"
        problems.append(f"{name}: {what}")
    return problems


def derivative_images(root: Path) -> list[str]:
    """Relative paths of the NIfTI files in a derivatives tree."""
    return [name for name in tree_files(root) if name.endswith((".nii", ".nii.gz"))]
