"""Same inputs, same outputs, bit for bit: across runs, plugins and thread counts.

Pipeline level: the BIDS-App command on one generated session, four times, each in a fresh
process: MultiProc with 2 threads per process, the same again, Linear with 2 threads, and
MultiProc with 1 thread. Every derivative file (NIfTI header and data, ITK transform files,
sidecar JSON, bval/bvec, tables, HTML reports) is compared whole, byte for byte; no sidecar
field is excluded, because none holds a timestamp or a path that differs between these runs
(see ``bidsrun.tree_differences``). Library level: the warp and the corrected image with numba
running 1 or 2 threads, as a hypothesis property over grids and interpolation orders. Compiler
level: every compiled kernel gives the same bytes when numba compiles it and when a later process
loads the machine code that compile saved (``cache=True``).

Bit-for-bit identity under any schedule and thread count is what a reproducible research
pipeline is expected to give (common practice, no source): our kernels split work by output
voxel and never reduce across threads, so no sum depends on the split.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numba
import numpy as np
import pytest
from bidsgen import make_study
from bidsrun import child_env, cli_command, derivative_images, run_cli, tree_differences
from hypothesis import given, settings
from hypothesis import strategies as st

from nl_unwarp.api import FrameSpec, make_frame
from nl_unwarp.demo import demo_coil_path
from nl_unwarp.io.coilfile import load_coil
from nl_unwarp.resample import correct_image
from nl_unwarp.warp import compute_warp

#: One session: a 3D image (full correction), a 2D one (through-plane only) and a 4D bold.
SELECTION = ("--participant-label", "01", "--session-label", "1", "--datatype", "anat", "func")
IMAGES = 3

#: name -> (plugin options, threads per process)
RUNS = {
    "multiproc_2threads": (("--plugin", "MultiProc", "--nprocs", "2"), 2),
    "multiproc_2threads_again": (("--plugin", "MultiProc", "--nprocs", "2"), 2),
    "linear_2threads": (("--plugin", "Linear"), 2),
    "multiproc_1thread": (("--plugin", "MultiProc", "--nprocs", "2"), 1),
}
BASE = "multiproc_2threads"


@pytest.fixture(scope="module")
def derivatives(tmp_path_factory):
    """Run every configuration of RUNS on the same generated dataset; their output folders."""
    tmp = tmp_path_factory.mktemp("repro")
    with pytest.MonkeyPatch.context() as mp:
        study = make_study(tmp, mp, subjects_per_site=1)
        outputs = {}
        for name, (plugin, threads) in RUNS.items():
            # The thread variables are set before the process starts, and --omp-nthreads
            # sets them again for the nipype workers.
            env = child_env(NUMBA_NUM_THREADS=str(threads), OMP_NUM_THREADS=str(threads))
            done = run_cli(cli_command(study.root, tmp / f"deriv_{name}", tmp / f"work_{name}",
                                       *SELECTION, "--site-config", str(study.site_config), *plugin,
                                       "--omp-nthreads", str(threads)), env)
            assert done.returncode == 0, done.stderr
            outputs[name] = tmp / f"deriv_{name}"
    return outputs


def test_runs_write_every_derivative(derivatives):
    # corrected image, displacement, Jacobian and transform per image (a sidecar each)
    assert len(derivative_images(derivatives[BASE])) >= 4 * IMAGES


@pytest.mark.parametrize("other", [name for name in RUNS if name != BASE])
def test_outputs_equal_bit_for_bit(derivatives, other):
    assert tree_differences(derivatives[BASE], derivatives[other]) == []


# Library level: numba's thread count does not change the warp or the corrected image.

@pytest.fixture(scope="module")
def numba_threads():
    if numba.config.NUMBA_NUM_THREADS < 2:
        pytest.skip("numba was started with one thread (NUMBA_NUM_THREADS=1 or one core)")
    before = numba.get_num_threads()
    yield
    numba.set_num_threads(before)


def _warp_and_correct(coil, data, affine, order, threads):
    numba.set_num_threads(threads)
    assert numba.get_num_threads() == threads
    frame, _ = make_frame(FrameSpec("HFS", isocenter_offset_mm=(0.0, 0.0, 30.0)))
    warp = compute_warp(coil, data.shape[:3], affine, frame)
    corrected = correct_image(data, affine, warp, order=order)
    return warp.disp_ras_mm, warp.jacobian, corrected


@settings(max_examples=6, deadline=None)
@given(shape=st.tuples(st.integers(9, 30), st.integers(9, 30), st.integers(5, 20)),
       voxel_mm=st.floats(4.0, 9.0), order=st.sampled_from([0, 1, 3, 5]), seed=st.integers(0, 2**16))
def test_thread_count_does_not_change_results(numba_threads, shape, voxel_mm, order, seed):
    demo_coil = load_coil(demo_coil_path())  # read only here
    data = np.random.default_rng(seed).random(shape, dtype=np.float32)
    affine = np.diag([voxel_mm, voxel_mm, voxel_mm, 1.0])
    affine[:3, 3] = -voxel_mm * (np.asarray(shape) - 1) / 2
    one = _warp_and_correct(demo_coil, data, affine, order, 1)
    two = _warp_and_correct(demo_coil, data, affine, order, 2)
    for a, b in zip(one, two, strict=True):
        assert a.dtype == b.dtype and a.tobytes() == b.tobytes()


# Compiler level: a kernel compiled in this process and the same kernel loaded from numba's
# on-disk cache give the same bytes (why this once failed: ``nl_unwarp._kernels.FAST_MATH``).

KERNEL_RUN = Path(__file__).with_name("kernelrun.py")
KERNEL_RUN_TIMEOUT_S = 900


def _kernel_results(out: Path, cache: Path) -> dict[str, np.ndarray]:
    done = subprocess.run([sys.executable, str(KERNEL_RUN), str(out)], capture_output=True, text=True,
                          env=child_env(NUMBA_CACHE_DIR=str(cache), NUMBA_DISABLE_JIT=None),
                          timeout=KERNEL_RUN_TIMEOUT_S)
    assert done.returncode == 0, done.stderr
    with np.load(out) as saved:
        return {name: saved[name] for name in saved.files}


def test_cached_kernels_equal_fresh_ones(tmp_path):
    cache = tmp_path / "numba_cache"
    fresh = _kernel_results(tmp_path / "fresh.npz", cache)
    assert list(cache.rglob("*.nbi")), "the first run saved no compiled kernel"
    saved = {p: p.stat().st_mtime_ns for p in cache.rglob("*.nbc")}
    cached = _kernel_results(tmp_path / "cached.npz", cache)
    # The second run loaded what the first saved: it compiled nothing new.
    assert {p: p.stat().st_mtime_ns for p in cache.rglob("*.nbc")} == saved
    assert sorted(fresh) == sorted(cached)
    differ = {name: int((fresh[name] != cached[name]).sum()) for name in fresh
              if fresh[name].tobytes() != cached[name].tobytes()}
    assert differ == {}, f"voxels that differ between compiled and cached kernels: {differ}"
