"""Several runs into one output folder: the dataset-level files merge, they are not overwritten.

Clusters run one job per participant, all writing into one derivatives folder, often at the
same time (common practice, no source; containers/README.md shows the Slurm array job). The
reference for the merged folder is one run over all the participants: every file, the
dataset-level ones included (decisions.tsv, reports/index.html, reports/index.json,
dataset_description.json, .bidsignore, the coil model pages), must be equal byte for byte
(``bidsrun.tree_differences``). The decision table is read back with Python's csv module, a
general-purpose reader, not with our own parser.
"""

from __future__ import annotations

import csv
import io
import json
import subprocess
import threading
from pathlib import Path

import pytest
from bidsgen import SOUTH_T1W, SOUTH_T2W_2D, T1W, T2W_2D, make_study
from bidsrun import (
    RUN_TIMEOUT_S,
    child_env,
    cli_command,
    kill_group,
    run_cli,
    start_cli,
    tree_differences,
    unfinished_files,
)
from hypothesis import given, settings
from hypothesis import strategies as st

from nl_unwarp.bids import app
from nl_unwarp.bids.derivatives import ensure_dataset, remove_partial_files
from nl_unwarp.cli import main
from nl_unwarp.errors import InputError
from nl_unwarp.io import lock as lock_module
from nl_unwarp.io.lock import LOCK_NAME, folder_lock
from nl_unwarp.report.files import read_index_record

#: Two images per participant: sub-01 a 3D image (full correction) and a 2D one (through-plane
#: only); sub-02 a 3D-corrected image (skipped, a row but no page) and a 2D one.
SELECTION = ("--session-label", "1", "--datatype", "anat")
IMAGES = {"01": (T1W, T2W_2D), "02": (SOUTH_T1W, SOUTH_T2W_2D)}
#: Seconds a thread may wait for the lock in the lock test (a hang, not a speed check).
LOCK_WAIT_S = 60


def _command(study, out: Path, work: Path, *labels: str) -> list[str]:
    return cli_command(study.root, out, work, "--participant-label", *labels, *SELECTION,
                       "--site-config", str(study.site_config), "--plugin", "Linear")


def _decision_rows(out: Path) -> list[dict]:
    with open(out / "decisions.tsv", newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f, delimiter="\t"))


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    """The generated dataset, an environment, and the folder of one run over both participants."""
    tmp = tmp_path_factory.mktemp("shared")
    with pytest.MonkeyPatch.context() as mp:
        study = make_study(tmp, mp, subjects_per_site=1)
        env = child_env()
    both = tmp / "deriv_both"
    done = run_cli(_command(study, both, tmp / "work_both", "01", "02"), env)
    assert done.returncode == 0, done.stderr
    return study, env, tmp, both


def _run_one_after_another(shared, name: str, labels: tuple[str, ...]) -> Path:
    study, env, tmp, _ = shared
    out = tmp / f"deriv_{name}"
    for label in labels:  # one work folder per participant, as the cluster jobs have
        done = run_cli(_command(study, out, tmp / f"work_{label}", label), env)
        assert done.returncode == 0, done.stderr
    return out


def test_runs_per_participant_equal_one_run_over_all(shared):
    _, _, _, both = shared
    rows = _decision_rows(both)
    assert [r["image"] for r in rows] == sorted(IMAGES["01"] + IMAGES["02"])
    out = _run_one_after_another(shared, "split", ("01", "02"))
    assert tree_differences(both, out) == []
    # The index page links every page that exists, of both runs' participants.
    index = (out / "reports" / "index.html").read_text(encoding="utf-8")
    for relpath in (T1W, T2W_2D, SOUTH_T2W_2D):
        page = Path(relpath).name.split(".")[0] + ".html"
        assert (out / "reports" / page).is_file() and f'href="{page}"' in index
    assert 'href="sub-02_ses-1_T1w.html"' not in index  # skipped: no page to link

    # (d) Running one participant again replaces its rows; the others stay as they were.
    table = (out / "decisions.tsv").read_text(encoding="utf-8")
    stale = table.replace("corrected in-plane (2D) by the scanner", "STALE", 1)
    assert stale != table
    (out / "decisions.tsv").write_text(stale, encoding="utf-8")
    study, env, tmp, _ = shared
    done = run_cli(_command(study, out, tmp / "work_01", "01"), env)
    assert done.returncode == 0, done.stderr
    rows_again = _decision_rows(out)
    assert len(rows_again) == len(rows) and "STALE" not in (out / "decisions.tsv").read_text()
    assert tree_differences(both, out) == []


def test_order_of_the_runs_does_not_matter(shared):
    _, _, _, both = shared
    out = _run_one_after_another(shared, "reverse", ("02", "01"))
    assert tree_differences(both, out) == []


def test_concurrent_runs_lose_nothing(shared):
    study, env, tmp, both = shared
    out = tmp / "deriv_concurrent"
    procs = [start_cli(_command(study, out, tmp / f"work_at_once_{label}", label), env,
                       stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
             for label in ("01", "02")]
    try:
        errors = [p.communicate(timeout=RUN_TIMEOUT_S)[1] for p in procs]
    finally:
        for p in procs:
            kill_group(p)
    assert [p.returncode for p in procs] == [0, 0], errors
    assert unfinished_files(out) == []
    assert [r["image"] for r in _decision_rows(out)] == sorted(IMAGES["01"] + IMAGES["02"])
    assert sorted(read_index_record(out / "reports")) == sorted(IMAGES["01"] + IMAGES["02"])
    assert tree_differences(both, out) == []


# The pieces, in process: the lock, the merge, the description, the clean-up.


def _row(image: str, reason: str = "not corrected by the scanner") -> dict:
    return {"image": image, "site": "north", "rule": "r", "decision": "full",
            "displacement_max_mm": 1.25, "reason": reason, "warnings": ""}


def test_merge_reads_inside_the_lock(tmp_path, monkeypatch):
    """A second run waiting for the lock must read the table only once it holds it, so it sees
    what the first run wrote meanwhile (flock(2): LOCK_EX waits while another open file holds
    the lock)."""
    out = tmp_path / "out"
    out.mkdir()
    waiting = threading.Event()
    real_flock = lock_module.fcntl.flock

    def flock(fd, op):
        if threading.current_thread().name == "second":
            waiting.set()  # it is about to wait for the lock the test holds
        return real_flock(fd, op)

    monkeypatch.setattr(lock_module.fcntl, "flock", flock)

    def second_run():
        with folder_lock(out):
            app.merge_decisions([_row(T2W_2D)], out)

    with folder_lock(out):
        thread = threading.Thread(target=second_run, name="second")
        thread.start()
        assert waiting.wait(LOCK_WAIT_S), "the second run never asked for the lock"
        app.merge_decisions([_row(T1W)], out)  # the first run's merge, lock held
    thread.join(LOCK_WAIT_S)
    assert not thread.is_alive()
    assert [r["image"] for r in _decision_rows(out)] == sorted([T1W, T2W_2D])
    assert (out / LOCK_NAME).exists()


IMAGE_NAMES = st.from_regex(r"sub-0[1-4]/ses-[12]/anat/sub-0[1-4]_T[12]w\.nii\.gz", fullmatch=True)


@settings(max_examples=30, deadline=None)
@given(images=st.lists(IMAGE_NAMES, min_size=1, max_size=8, unique=True), data=st.data())
def test_merge_is_independent_of_grouping_and_order(tmp_path_factory, images, data):
    """Any split of the rows into runs, in any order, repeated or not, gives the table of one
    run over all rows."""
    rows = [_row(image) for image in images]
    one = tmp_path_factory.mktemp("one")
    app.merge_decisions(rows, one)
    split = tmp_path_factory.mktemp("split")
    groups = data.draw(st.lists(st.integers(0, 2), min_size=len(rows), max_size=len(rows)))
    order = data.draw(st.permutations([0, 1, 2]))
    for group in [*order, order[0]]:  # the first group runs twice
        app.merge_decisions([r for r, g in zip(rows, groups, strict=True) if g == group], split)
    assert (split / "decisions.tsv").read_bytes() == (one / "decisions.tsv").read_bytes()
    table = list(csv.DictReader(io.StringIO((one / "decisions.tsv").read_text()), delimiter="\t"))
    assert [r["image"] for r in table] == sorted(images)


def test_cells_with_tabs_do_not_split_rows(tmp_path):
    app.merge_decisions([_row(T1W, reason="a\tb\nc")], tmp_path)
    (row,) = _decision_rows(tmp_path)
    assert row["reason"] == "a b c" and row["warnings"] == ""


def test_foreign_decision_table_is_refused(tmp_path):
    (tmp_path / "decisions.tsv").write_text("participant_id\tage\nsub-01\t30\n")
    with pytest.raises(InputError, match="decisions.tsv: header differs"):
        app.merge_decisions([_row(T1W)], tmp_path)
    assert (tmp_path / "decisions.tsv").read_text() == "participant_id\tage\nsub-01\t30\n"


def test_dataset_description_written_once_and_another_pipelines_refused(tmp_path):
    raw = tmp_path / "raw"
    raw.mkdir()
    (raw / "dataset_description.json").write_text('{"Name": "x", "BIDSVersion": "1.9.0"}')
    out = tmp_path / "out"
    out.mkdir()
    target = ensure_dataset(out, raw)
    before = target.stat()
    assert ensure_dataset(out, raw) == target
    after = target.stat()
    assert (after.st_ino, after.st_mtime_ns) == (before.st_ino, before.st_mtime_ns)  # left alone
    # BIDS 1.9 derivatives: GeneratedBy names the pipeline that made the dataset.
    other = {"Name": "d", "BIDSVersion": "1.9.0", "DatasetType": "derivative",
             "GeneratedBy": [{"Name": "some-other-pipeline"}]}
    target.write_text(json.dumps(other))
    with pytest.raises(InputError, match="some-other-pipeline, not nl_unwarp") as err:
        ensure_dataset(out, raw)
    assert "\n" not in str(err.value)
    assert json.loads(target.read_text()) == other


def test_cli_refuses_another_pipelines_folder_in_one_line(tmp_path, monkeypatch, capsys):
    study = make_study(tmp_path, monkeypatch, subjects_per_site=1, simulate=False)
    out = tmp_path / "out"
    out.mkdir()
    (out / "dataset_description.json").write_text(json.dumps(
        {"Name": "d", "BIDSVersion": "1.9.0", "GeneratedBy": [{"Name": "other"}]}))
    code = main([str(study.root), str(out), "participant", "--site-config", str(study.site_config),
                 "-w", str(tmp_path / "work"), "--quiet", "--participant-label", "01"])
    assert code == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "dataset_description.json" in err[0] and "other" in err[0]
    assert sorted(p.name for p in out.iterdir()) == ["dataset_description.json"]  # nothing added


def test_clean_up_spares_other_participants_files(tmp_path):
    def partial(rel: str) -> Path:
        path = tmp_path / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text("x")
        return path

    mine = [partial("sub-01/ses-1/anat/.sub-01_ses-1_T1w.partial-0123abcd.nii.gz"),
            partial("reports/.sub-01_ses-1_T1w.partial-0123abcd.html"),
            partial("reports/.index.partial-0123abcd.html"),
            partial(".decisions.partial-0123abcd.tsv")]
    theirs = [partial("sub-02/ses-1/anat/.sub-02_ses-1_T1w.partial-0123abcd.nii.gz"),
              partial("reports/.sub-02_ses-1_T1w.partial-0123abcd.html")]
    assert remove_partial_files(tmp_path, ["sub-01"]) == sorted(mine)
    assert all(p.exists() for p in theirs) and not any(p.exists() for p in mine)
