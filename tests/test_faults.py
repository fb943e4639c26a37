"""A BIDS run killed in the middle, then run again: complete derivatives, identical to a clean run.

The run is a child process in its own process group; once its work folder shows that a given
share of the pipeline's nodes has finished (nipype writes a node's ``result_*.pklz`` when the
node is done; the share is of the nodes an uninterrupted run completes), the whole group (the command and its
nipype workers) gets SIGKILL, as a scheduler ending a job or a node losing power would do:
nothing gets to clean up. The same command is then run again into the same output and work
folders. The derivatives must equal those of an uninterrupted run byte for byte, with no
temporary or ``.partial`` file left, and no process of the killed run may remain.
"""

from __future__ import annotations

import subprocess
import time

import pytest
from bidsgen import make_study
from bidsrun import (
    child_env,
    cli_command,
    derivative_images,
    group_alive,
    kill_group,
    run_cli,
    start_cli,
    tree_differences,
    unfinished_files,
)

#: One session, every datatype: 4 images, a few dozen pipeline nodes.
SELECTION = ("--participant-label", "01", "--session-label", "1")
IMAGES = 4
#: Shares of the pipeline's nodes finished when the run is killed: early (warps being
#: computed) and late (derivatives and reports being written).
KILL_AT = (0.25, 0.7)
#: Seconds to wait for the share to be reached, and for killed processes to be gone
#: (a hang, not a speed check).
START_TIMEOUT_S = 300
REAP_TIMEOUT_S = 30
POLL_S = 0.1


@pytest.fixture(scope="module")
def study_and_clean(tmp_path_factory):
    """The generated dataset, and the derivatives of an uninterrupted run of it."""
    tmp = tmp_path_factory.mktemp("faults")
    with pytest.MonkeyPatch.context() as mp:
        study = make_study(tmp, mp, subjects_per_site=1)
        env = child_env()
    clean = tmp / "deriv_clean"
    done = run_cli(_command(study, clean, tmp / "work_clean"), env)
    assert done.returncode == 0, done.stderr
    return study, clean, env, _finished_nodes(tmp / "work_clean")


def _command(study, out, work) -> list[str]:
    return cli_command(study.root, out, work, *SELECTION, "--site-config", str(study.site_config),
                       "--plugin", "MultiProc", "--nprocs", "2")


def _finished_nodes(work) -> int:
    """Nodes whose result file nipype has written (each node writes one when it is done)."""
    try:
        return len(list(work.rglob("result_*.pklz")))
    except OSError:  # a folder appeared or moved during the walk: count again next poll
        return 0


def _run_and_kill(command, env, work, stderr_file, kill_after: int) -> int:
    """Start the run, SIGKILL its process group once ``kill_after`` nodes finished.

    Returns the number of nodes finished when it was killed.
    """
    with open(stderr_file, "wb") as err:
        proc = start_cli(command, env, stdout=subprocess.DEVNULL, stderr=err)
    try:
        deadline = time.monotonic() + START_TIMEOUT_S
        while True:
            done = _finished_nodes(work)
            if done >= kill_after:
                break
            assert proc.poll() is None, f"the run ended before the kill:\n{stderr_file.read_text()}"
            assert time.monotonic() < deadline, "no progress: the run hangs"
            time.sleep(POLL_S)
        assert proc.poll() is None  # killed while running, not after its end
    finally:
        kill_group(proc)
        deadline = time.monotonic() + REAP_TIMEOUT_S
        while group_alive(proc.pid) and time.monotonic() < deadline:
            time.sleep(POLL_S)
    assert not group_alive(proc.pid), "processes of the killed run are still alive"
    return done


@pytest.mark.parametrize("share", KILL_AT)
def test_killed_run_completes_on_rerun_identical_to_clean_run(study_and_clean, tmp_path, share):
    study, clean, env, nodes = study_and_clean
    out, work = tmp_path / "derivatives", tmp_path / "work"
    command = _command(study, out, work)

    finished = _run_and_kill(command, env, work, tmp_path / "killed.stderr", max(1, int(share * nodes)))
    assert 1 <= finished < nodes
    # The run had not reached its end: the decision table is written last.
    assert not (out / "decisions.tsv").exists()

    again = run_cli(command, env)
    assert again.returncode == 0, again.stderr
    assert unfinished_files(out) == []
    assert len(derivative_images(out)) >= 4 * IMAGES
    assert tree_differences(clean, out) == []
