"""Small invented BIDS datasets for the tests, and ways to break them.

The dataset itself comes from :mod:`nl_unwarp.bids.demodata` (two fictional
sites with different fictional gradient systems, 24^3 voxels at 8 mm); this
module adds the coil folder, the site configuration and the bad-input variants.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path

# nipype: no version check over the network (set before nipype is imported).
os.environ.setdefault("NIPYPE_NO_ET", "1")

from nl_unwarp.bids import demodata  # noqa: E402


@dataclass
class Study:
    """A generated dataset with its coil folder and site configuration."""

    root: Path
    coils: Path
    site_config: Path

    def sidecar(self, relpath: str) -> Path:
        return self.root / relpath.replace(".nii.gz", ".json")

    def edit_sidecar(self, relpath: str, **changes) -> None:
        """Set keys (a value of None removes the key)."""
        path = self.sidecar(relpath)
        doc = json.loads(path.read_text())
        for key, value in changes.items():
            if value is None:
                doc.pop(key, None)
            else:
                doc[key] = value
        path.write_text(json.dumps(doc))

    def edit_config(self, edit) -> None:
        doc = json.loads(self.site_config.read_text())
        edit(doc)
        self.site_config.write_text(json.dumps(doc))


def make_study(tmp: Path, monkeypatch, *, subjects_per_site: int = 1, simulate: bool = True,
               moved_table: bool = True) -> Study:
    """Generate the dataset under ``tmp/rawdata``, coils under ``tmp/coils`` (outside it)."""
    root = demodata.make_dataset(tmp / "rawdata", subjects_per_site=subjects_per_site,
                                 simulate=simulate, moved_table=moved_table)
    demodata.write_coils(tmp / "coils")
    monkeypatch.setenv(demodata.COIL_DIR_VARIABLE, str(tmp / "coils"))
    return Study(root, tmp / "coils", demodata.write_site_config(tmp / "sites.json"))


T1W = "sub-01/ses-1/anat/sub-01_ses-1_T1w.nii.gz"
T2W_2D = "sub-01/ses-1/anat/sub-01_ses-1_acq-2d_T2w.nii.gz"
BOLD = "sub-01/ses-1/func/sub-01_ses-1_task-rest_bold.nii.gz"
DWI = "sub-01/ses-1/dwi/sub-01_ses-1_dwi.nii.gz"
MOVED_T1W = "sub-01/ses-2/anat/sub-01_ses-2_T1w.nii.gz"
SOUTH_T1W = "sub-02/ses-1/anat/sub-02_ses-1_T1w.nii.gz"
SOUTH_T2W_2D = "sub-02/ses-1/anat/sub-02_ses-1_acq-2d_T2w.nii.gz"


def configure_nipype(tmp: Path) -> None:
    """Crash files and logs of nipype go to the test's folder, plain-text crash files."""
    from nipype import config, logging

    config.set("execution", "crashdump_dir", str(tmp / "crash"))
    config.set("execution", "crashfile_format", "txt")
    # Keep outputs no downstream node consumes: the tests inspect them.
    config.set("execution", "remove_unnecessary_outputs", "false")
    config.set("logging", "workflow_level", "WARNING")
    config.set("logging", "interface_level", "WARNING")
    logging.update_logging(config)
