"""Text input files (nl_unwarp.io.text): each loader refuses a missing file, a folder and
non-UTF-8 bytes on one line naming the file (the project's rule for bad input)."""

from __future__ import annotations

import pytest

from nl_unwarp.errors import InputError
from nl_unwarp.io.coilfile import import_table
from nl_unwarp.io.phantomdef import load_phantom_definition
from nl_unwarp.io.samples import load_field_samples
from nl_unwarp.io.text import read_input_text

LOADERS = {
    "table file": lambda p: import_table(p, normalisation="schmidt", condon_shortley=False,
                                         reference_radius_mm=250.0, valid_radius_mm=200.0),
    "field sample file": lambda p: load_field_samples(p, axis="x", gradient_mT_per_m=10.0),
    "phantom definition file": load_phantom_definition,
}


def _message(load, path) -> str:
    with pytest.raises(InputError) as info:
        load(path)
    text = str(info.value)
    assert "\n" not in text and str(path) in text
    return text


@pytest.mark.parametrize("what", LOADERS)
def test_loaders_refuse_missing_folder_and_binary_files(tmp_path, what):
    load = LOADERS[what]
    folder = tmp_path / "a_folder.tsv"
    folder.mkdir()
    binary = tmp_path / "binary.tsv"
    binary.write_bytes(b"\xff\xfe\x00 not text")
    assert f"{what} not found" in _message(load, tmp_path / "absent.tsv")
    assert f"{what} is a folder, not a file" in _message(load, folder)
    assert f"{what} is not UTF-8 text" in _message(load, binary)


def test_read_input_text_returns_the_text(tmp_path):
    path = tmp_path / "t.txt"
    path.write_text("µ 1 2\n", encoding="utf-8")
    assert read_input_text(path, "x") == "µ 1 2\n"
