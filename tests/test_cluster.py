"""The BIDS pipeline on a real Slurm cluster through nipype's SLURM plugin, from our CLI.

CI starts a one-node cluster on loopback with ``.ci/slurm-up`` (Debian's slurmctld, slurmd and
munge). Where Slurm is not installed or no node is idle the cluster test is skipped and says
why. The reference is a MultiProc run of the same command: the derivatives must be equal
byte for byte.
"""

from __future__ import annotations

import getpass
import json
import os
import pwd
import shutil
import subprocess
import uuid

import pytest
from bidsgen import make_study
from bidsrun import child_env, cli_command, derivative_images, run_cli, tree_differences

from nl_unwarp.bids import app

#: A small selection: a 3D image corrected fully, a 2D one through-plane only, and a DWI
#: (its bval/bvec travel along): every kind of derivative, few batch jobs.
SELECTION = ("--participant-label", "01", "--session-label", "1", "--datatype", "anat", "dwi")
IMAGES = 3
#: Batch jobs at a time: the test cluster has as many slots as this machine has cores.
MAX_JOBS = 2
SINFO_TIMEOUT_S = 30


def _sinfo(*fields: str) -> list[str]:
    out = subprocess.run(["sinfo", "-h", *fields], capture_output=True, text=True,
                         timeout=SINFO_TIMEOUT_S, check=True)
    return [line.strip() for line in out.stdout.splitlines() if line.strip()]


def _slurm_partition() -> str:
    """The default partition of a cluster with an idle node; skip the test otherwise."""
    for tool in ("sinfo", "squeue", "sbatch", "scancel"):
        if shutil.which(tool) is None:
            pytest.skip(f"{tool} not found: Slurm is not installed here "
                        "(CI installs and starts a one-node cluster with .ci/slurm-up)")
    try:
        states = _sinfo("-N", "-o", "%N %T")
        partitions = _sinfo("-o", "%P")
    except (subprocess.CalledProcessError, subprocess.TimeoutExpired) as exc:
        pytest.skip(f"sinfo failed, slurmctld is not reachable ({exc}); start it with .ci/slurm-up")
    if not any(line.split()[-1].rstrip("*~#").startswith(("idle", "mixed")) for line in states):
        pytest.skip(f"no idle Slurm node (sinfo: {'; '.join(states) or 'no nodes'})")
    default = [p.rstrip("*") for p in partitions if p.endswith("*")]
    return (default or [partitions[0]])[0]


def _cancel_jobs(comment: str) -> None:
    """scancel every job still known to Slurm with this comment."""
    out = subprocess.run(["squeue", "-h", "-o", "%i %k"], capture_output=True, text=True,
                         timeout=SINFO_TIMEOUT_S)
    ids = [line.split()[0] for line in out.stdout.splitlines() if line.split()[1:] == [comment]]
    if ids:
        subprocess.run(["scancel", *ids], timeout=SINFO_TIMEOUT_S, check=False)


@pytest.fixture
def study(tmp_path, monkeypatch):
    return make_study(tmp_path, monkeypatch, subjects_per_site=1)


def test_slurm_plugin_run_equals_multiproc_run(study, tmp_path):
    partition = _slurm_partition()
    common = (*SELECTION, "--site-config", str(study.site_config))
    reference = run_cli(cli_command(study.root, tmp_path / "deriv_multiproc", tmp_path / "work_multiproc",
                                    *common, "--plugin", "MultiProc", "--nprocs", "2"))
    assert reference.returncode == 0, reference.stderr

    # sbatch arguments from our command line: the partition, one CPU per job, and the job
    # logs in a folder of our own (nipype adds its own -o only when none is given).
    logs = tmp_path / "slurm_logs"
    logs.mkdir()
    # A comment of this test's own marks its jobs, so that none is left queued if it fails.
    comment = f"nlutest_{uuid.uuid4().hex[:12]}"  # no "-e": nipype looks for it
    plugin_args = {"sbatch_args": f"-p {partition} -c 1 -o {logs}/nlu-%j.out --comment={comment}",
                   "max_jobs": MAX_JOBS}
    # No LOGNAME, as under cron, CI or a container with an arbitrary uid: nipype's batch
    # plugins name jobs after it (app._set_login_name provides it).
    env = child_env(LOGNAME=None, USER=None)
    try:
        slurm = run_cli(cli_command(study.root, tmp_path / "deriv_slurm", tmp_path / "work_slurm",
                                    *common, "--plugin", "SLURM", "--plugin-args", json.dumps(plugin_args)),
                        env)
    finally:
        _cancel_jobs(comment)
    assert slurm.returncode == 0, slurm.stderr

    # The nodes ran as Slurm jobs, with the -o we passed: one log of ours per batch script
    # nipype submitted (what the jobs print depends on nipype's log level, so the count is
    # the check, not the content).
    job_logs = sorted(logs.glob("nlu-*.out"))
    scripts = sorted((tmp_path / "work_slurm").rglob("batchscript_*.sh"))
    assert len(job_logs) >= 2 * IMAGES  # at least make_warp and apply_warp per image
    assert len(job_logs) == len(scripts)

    assert len(derivative_images(tmp_path / "deriv_slurm")) >= 3 * IMAGES
    assert tree_differences(tmp_path / "deriv_multiproc", tmp_path / "deriv_slurm") == []


def test_worker_config_is_set_for_the_run_only(tmp_path, monkeypatch):
    """The worker settings reach nipype's worker and batch-job processes through the
    environment during a run, and the caller's environment is restored after it (a leaked
    value gave later runs in the same process this run's log levels)."""
    monkeypatch.setenv("NIPYPE_CONFIG_DIR", str(tmp_path / "callers"))
    with app._worker_config(tmp_path / "work") as folder:
        assert os.environ["NIPYPE_CONFIG_DIR"] == str(folder)
        assert "workflow_level = WARNING" in (folder / "nipype.cfg").read_text()
    assert os.environ["NIPYPE_CONFIG_DIR"] == str(tmp_path / "callers")
    monkeypatch.delenv("NIPYPE_CONFIG_DIR")
    with app._worker_config(tmp_path / "work"):
        pass
    assert "NIPYPE_CONFIG_DIR" not in os.environ


# The login name nipype's batch plugins need (no cluster required).

def _without_login_variables(monkeypatch) -> None:
    for var in ("LOGNAME", "USER", "LNAME", "USERNAME"):
        monkeypatch.setenv(var, "placeholder")  # so that the undo restores the original state
        monkeypatch.delenv(var)


def test_login_name_comes_from_the_passwd_database(monkeypatch):
    _without_login_variables(monkeypatch)
    app._set_login_name()
    # Reference: the POSIX user database, read through Python's pwd module.
    assert os.environ["LOGNAME"] == pwd.getpwuid(os.getuid()).pw_name


def test_login_name_without_passwd_entry_is_the_uid(monkeypatch):
    _without_login_variables(monkeypatch)

    def no_entry():
        raise KeyError(f"getpwuid(): uid not found: {os.getuid()}")

    monkeypatch.setattr(getpass, "getuser", no_entry)
    app._set_login_name()
    assert os.environ["LOGNAME"] == f"uid{os.getuid()}"


def test_login_name_already_set_is_kept(monkeypatch):
    monkeypatch.setenv("LOGNAME", "nlu-operator")
    app._set_login_name()
    assert os.environ["LOGNAME"] == "nlu-operator"


# How often nipype's scheduler looks for finished nodes (no cluster required).

def _nipype_default(option: str) -> float:
    """nipype's shipped default of an ``[execution]`` option (nipype.utils.config's template)."""
    from configparser import ConfigParser

    from nipype.utils.config import DEFAULT_CONFIG_TPL

    parser = ConfigParser(interpolation=None)
    parser.read_string(DEFAULT_CONFIG_TPL)
    return parser.getfloat("execution", option)


def test_local_plugins_poll_quickly_batch_plugins_keep_nipype_default(tmp_path):
    nipype_poll_s = _nipype_default("poll_sleep_duration")
    for plugin in ("MultiProc", "Linear"):
        settings = app._execution_config(plugin, tmp_path / "crash")
        assert settings["poll_sleep_duration"] == app.LOCAL_POLL_S < nipype_poll_s
        assert settings["crashdump_dir"] == str(tmp_path / "crash")
    # Each round of a batch plugin runs squeue (qstat, ...) per job: nipype's pace is kept.
    for plugin in ("SLURM", "SGE", "PBS"):
        assert "poll_sleep_duration" not in app._execution_config(plugin, tmp_path / "crash")


def test_heap_is_frozen_during_the_run_only():
    import gc

    before = gc.get_freeze_count()
    with app._frozen_heap():
        # Python documentation, gc.freeze: every object alive now is moved to the permanent
        # generation, which collections do not scan.
        assert gc.get_freeze_count() > before
    assert gc.get_freeze_count() == 0  # gc.unfreeze puts them all back
