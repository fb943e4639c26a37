"""Speed and peak memory of the correction against SimpleITK and scipy (a script, not a test).

Measured in one run on the same image and the same displacement field:

* **ours, end to end**: :func:`nl_unwarp.warp.compute_warp` (displacement and
  Jacobian determinant), :func:`nl_unwarp.resample.correct_image` (cubic
  B-spline, Jacobian factor) and :func:`nl_unwarp.io.itk.write_itk_field`
  inside an :class:`~nl_unwarp.io.atomic.OutputSet`, to ``.nii`` and, as a
  separate row, to ``.nii.gz``;
* **SimpleITK**, resampling only, through the precomputed field with cubic
  B-spline interpolation: ``WarpImageFilter`` and ``Resample`` with a
  ``DisplacementFieldTransform`` (field read as CONVENTIONS.md section 4 says);
* **scipy** ``map_coordinates(order=3)`` at precomputed coordinates, for reference.

Each path runs in a fresh subprocess per repetition (so that its peak resident
memory, ``ru_maxrss``, is its own); repetitions are interleaved across paths so
that the load of a shared machine falls on all of them alike. Reported: the
median of the repetitions. Run ``python benchmarks/bench_correct.py --help``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

#: Benchmark grid: a 1 mm whole-head T1w-like volume.
SHAPE_FULL = (256, 256, 176)
#: Smoke-run grid (``--quick``), same voxel size.
SHAPE_QUICK = (96, 96, 64)
VOXEL_MM = 1.0
#: Seed of the image content.
SEED = 20261202
#: ours / SimpleITK wall time we aim to stay under (project target).
TARGET_RATIO = 0.75
#: Peak resident memory of our end-to-end path we aim to stay under (project target).
TARGET_PEAK_BYTES = 2 * 1024**3
#: Voxels of the raw grid's edge left out of the agreement check: near the edge
#: the boundary rules of the spline coefficients and of "inside" may differ.
EDGE_VOXELS = 4
#: Degree of the invented benchmark coil.
BENCH_DEGREE = 15

PATHS = ("ours-nii", "ours-nii.gz", "sitk-warp", "sitk-resample", "scipy")
LABELS = {
    "ours-nii": "ours end to end, field to .nii",
    "ours-nii.gz": "ours end to end, field to .nii.gz",
    "sitk-warp": "SimpleITK WarpImageFilter (bspline)",
    "sitk-resample": "SimpleITK Resample + DisplacementFieldTransform",
    "scipy": "scipy map_coordinates(order=3)",
}
STEP_LABELS = {"warp": "compute_warp (+ Jacobian)", "correct": "correct_image (cubic, x det J)",
               "write": "write_itk_field", "transform": "DisplacementFieldTransform(Image(field))",
               "resample": "Resample"}


def bench_coil_document() -> dict:
    """An invented degree-15 gradient system (FICTIONAL: no real scanner's numbers).

    Odd degrees only, as a coil symmetric about the isocenter allows; x carries
    cosine terms and y sine terms of odd order m, z the m = 0 terms. The
    magnitudes halve every two degrees from 0.085 at n = 3 (a few mm at 15 cm).
    """
    def amplitude(n: int) -> float:
        return (-1) ** ((n - 1) // 2) * 0.085 * 0.5 ** ((n - 3) / 2)

    odd = range(3, BENCH_DEGREE + 1, 2)
    x_cos = [[1, 1, 1.0]] + [[n, m, round(amplitude(n) * 0.15 ** ((m - 1) / 2), 8)]
                             for n in odd for m in range(1, n + 1, 2)]
    y_sin = [[1, 1, 1.0]] + [[n, m, round(0.96 * amplitude(n) * (-0.15) ** ((m - 1) / 2), 8)]
                             for n in odd for m in range(1, n + 1, 2)]
    z_cos = [[1, 0, 1.0]] + [[n, 0, round(1.2 * amplitude(n), 8)] for n in odd]

    def axis(cos, sin):
        return {"normalisation": "schmidt", "condon_shortley": False, "reference_radius_mm": 250.0,
                "valid_radius_mm": 225.0, "cos": cos, "sin": sin}

    return {
        "format": "nl_unwarp-coil", "format_version": 1,
        "label": "NLU-Bench Fifteen (FICTIONAL benchmark gradient system)", "frame": "device",
        "source": {"kind": "design", "date": "2026-12-02",
                   "description": "Invented for nl_unwarp's benchmark; not any real scanner."},
        "axes": {"x": axis(x_cos, []), "y": axis([], y_sin), "z": axis(z_cos, [])},
    }


def bench_affine(shape) -> np.ndarray:
    """1 mm voxels, grid centred on the gradient isocenter (RAS)."""
    affine = np.diag([VOXEL_MM] * 3 + [1.0])
    affine[:3, 3] = -VOXEL_MM * (np.asarray(shape) - 1) / 2
    return affine


def bench_image(shape) -> np.ndarray:
    """Seeded smooth random content, float32, about 500 +- 200."""
    from scipy import ndimage

    rng = np.random.default_rng(SEED)
    vol = ndimage.gaussian_filter(rng.standard_normal(shape, dtype=np.float32), 3.0, mode="wrap")
    return (500.0 + 200.0 * vol / np.abs(vol).max()).astype(np.float32)


def prepare(workdir: Path, shape) -> dict:
    """Write the coil file, the image and the precomputed ITK field into ``workdir``."""
    import nibabel as nib

    from nl_unwarp.frames import DeviceFrame
    from nl_unwarp.io.atomic import OutputSet
    from nl_unwarp.io.coilfile import load_coil
    from nl_unwarp.io.itk import write_itk_field
    from nl_unwarp.warp import compute_warp

    (workdir / "out").mkdir(parents=True, exist_ok=True)
    coil_path = workdir / "bench_coil.json"
    coil_path.write_text(json.dumps(bench_coil_document(), indent=1) + "\n")
    coil = load_coil(coil_path)  # validates the invented model
    affine = bench_affine(shape)
    img = nib.Nifti1Image(bench_image(shape), affine)
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    nib.save(img, str(workdir / "image.nii"))
    warp = compute_warp(coil, shape, affine, DeviceFrame("HFS"))
    with OutputSet() as out:
        write_itk_field(out, workdir / "field.nii", warp.disp_ras_mm, affine)
    return {"degree": coil.degree, "valid_radius_mm": coil.valid_radius_mm,
            "max_displacement_mm": float(warp.magnitude_mm.max())}


def _rss_bytes(key: str = "VmRSS") -> int:
    """A memory line of /proc/self/status, bytes (0 where there is no /proc)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith(key + ":"):
                return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


def _peak_bytes() -> int:
    """Peak resident memory of this process, bytes (ru_maxrss is KiB on Linux)."""
    return max(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024, _rss_bytes("VmHWM"))


def _ours_once(image, coil_path: Path, dest: Path) -> tuple[dict, object, np.ndarray]:
    from nl_unwarp.frames import DeviceFrame
    from nl_unwarp.io.atomic import OutputSet
    from nl_unwarp.io.coilfile import load_coil
    from nl_unwarp.io.itk import write_itk_field
    from nl_unwarp.resample import correct_image
    from nl_unwarp.warp import compute_warp

    t0 = time.perf_counter()
    coil = load_coil(coil_path)
    warp = compute_warp(coil, image.spatial_shape, image.affine, DeviceFrame("HFS"))
    t1 = time.perf_counter()
    corrected = correct_image(image.data, image.affine, warp, order=3, jacobian=True)
    t2 = time.perf_counter()
    with OutputSet() as out:
        write_itk_field(out, dest, warp.disp_ras_mm, warp.affine)
    t3 = time.perf_counter()
    return {"warp": t1 - t0, "correct": t2 - t1, "write": t3 - t2}, warp, corrected


def _warm_up(coil_path: Path, workdir: Path) -> float:
    """Run our path once on a tiny grid (loads or compiles the numba kernels); seconds."""
    from nl_unwarp.io.nifti import LoadedImage

    shape = (12, 10, 8)
    # Fortran order, as nibabel hands out NIfTI data: the same kernel signatures.
    data = np.asfortranarray(bench_image(shape))
    tiny = LoadedImage("warm-up", data, bench_affine(shape), None)
    t0 = time.perf_counter()
    _ours_once(tiny, coil_path, workdir / "out" / "warmup_field.nii")
    return time.perf_counter() - t0


def worker_ours(workdir: Path, suffix: str, save: bool) -> dict:
    from nl_unwarp.io.nifti import load_image

    coil_path = workdir / "bench_coil.json"
    warmup_s = _warm_up(coil_path, workdir)
    image = load_image(workdir / "image.nii")
    # Read the memory map now, outside the timing (SimpleITK's image is in memory too);
    # np.array keeps nibabel's Fortran order.
    image.data = np.array(image.data)
    dest = workdir / "out" / f"ours_field{suffix}"
    dest.unlink(missing_ok=True)  # a fresh file, as in a pipeline (no replace of an old one)
    rss_before = _rss_bytes()
    steps, warp, corrected = _ours_once(image, coil_path, dest)
    result = {"seconds": sum(steps.values()), "steps": steps, "warmup_s": warmup_s,
              "rss_before": rss_before, "peak": _peak_bytes(),
              "interpolation_error_mm": warp.interpolation_error_mm,
              "jacobian_interpolation_error": warp.jacobian_interpolation_error,
              "lattice_mm": warp.lattice_mm, "field_bytes": dest.stat().st_size}
    if save:
        np.save(workdir / "out" / "ours.npy", corrected)
        np.save(workdir / "out" / "ours_jacobian.npy", warp.jacobian)
    return result


def _sitk_inputs(workdir: Path):
    import SimpleITK as sitk

    image = sitk.ReadImage(str(workdir / "image.nii"), sitk.sitkFloat32)
    # CONVENTIONS.md section 4: read the field as a vector of float64.
    field = sitk.ReadImage(str(workdir / "field.nii"), sitk.sitkVectorFloat64)
    return sitk, image, field


def worker_sitk_warp(workdir: Path, save: bool) -> dict:
    sitk, image, field = _sitk_inputs(workdir)
    rss_before = _rss_bytes()
    t0 = time.perf_counter()
    warper = sitk.WarpImageFilter()
    warper.SetInterpolator(sitk.sitkBSpline)
    warper.SetOutputParameteresFromImage(field)
    warper.SetEdgePaddingValue(0.0)
    result_img = warper.Execute(image, field)
    seconds = time.perf_counter() - t0
    if save:
        np.save(workdir / "out" / "sitk-warp.npy", sitk.GetArrayViewFromImage(result_img).T)
    return {"seconds": seconds, "rss_before": rss_before, "peak": _peak_bytes(),
            "threads": sitk.ProcessObject.GetGlobalDefaultNumberOfThreads()}


def worker_sitk_resample(workdir: Path, save: bool) -> dict:
    sitk, image, field = _sitk_inputs(workdir)
    rss_before = _rss_bytes()
    t0 = time.perf_counter()
    # The constructor takes the buffer of the image it is given (CONVENTIONS.md section 4).
    transform = sitk.DisplacementFieldTransform(sitk.Image(field))
    t1 = time.perf_counter()
    result_img = sitk.Resample(image, image, transform, sitk.sitkBSpline, 0.0)
    t2 = time.perf_counter()
    if save:
        np.save(workdir / "out" / "sitk-resample.npy", sitk.GetArrayViewFromImage(result_img).T)
    return {"seconds": t2 - t0, "steps": {"transform": t1 - t0, "resample": t2 - t1},
            "rss_before": rss_before, "peak": _peak_bytes()}


def worker_scipy(workdir: Path, save: bool) -> dict:
    import nibabel as nib
    from scipy import ndimage

    from nl_unwarp.io.itk import read_itk_field

    img = nib.load(str(workdir / "image.nii"))
    data = np.asarray(img.dataobj, dtype=np.float32)
    disp_ras_mm, affine = read_itk_field(workdir / "field.nii")
    t0 = time.perf_counter()
    ijk = np.indices(data.shape, dtype=np.float64)
    # Raw voxel index of p + d(p), p the output voxel centres (same grid here).
    index_from_ras = np.linalg.inv(img.affine)[:3, :3] @ affine[:3, :3]
    coords = np.einsum("ab,b...->a...", index_from_ras, ijk)
    coords += np.einsum("ab,...b->a...", np.linalg.inv(img.affine)[:3, :3], disp_ras_mm)
    coords_s = time.perf_counter() - t0
    rss_before = _rss_bytes()
    t0 = time.perf_counter()
    out = ndimage.map_coordinates(data, coords, order=3, mode="mirror")
    seconds = time.perf_counter() - t0
    if save:
        np.save(workdir / "out" / "scipy.npy", out)
    return {"seconds": seconds, "coords_s": coords_s, "rss_before": rss_before, "peak": _peak_bytes()}


def worker_numba_start(workdir: Path) -> dict:
    """Import time and first-call time of our path on a tiny grid in this process."""
    t0 = time.perf_counter()
    import nl_unwarp.resample  # noqa: F401
    import nl_unwarp.warp  # noqa: F401

    import_s = time.perf_counter() - t0
    first = _warm_up(workdir / "bench_coil.json", workdir)
    second = _warm_up(workdir / "bench_coil.json", workdir)
    return {"import_s": import_s, "first_call_s": first, "second_call_s": second}


def run_worker(name: str, workdir: Path, save: bool) -> dict:
    if name.startswith("ours-"):
        return worker_ours(workdir, "." + name.split("-", 1)[1], save)
    if name == "numba-start":
        return worker_numba_start(workdir)
    return {"sitk-warp": worker_sitk_warp, "sitk-resample": worker_sitk_resample,
            "scipy": worker_scipy}[name](workdir, save)


def spawn(name: str, workdir: Path, *, save: bool = False, cache_dir: Path) -> dict:
    """Run one worker in a fresh interpreter; returns its JSON report."""
    env = dict(os.environ, NUMBA_CACHE_DIR=str(cache_dir))
    cmd = [sys.executable, str(Path(__file__).resolve()), "--worker", name, "--workdir", str(workdir)]
    if save:
        cmd.append("--save")
    proc = subprocess.run(cmd, env=env, capture_output=True, text=True, check=False)
    if proc.returncode != 0:
        raise RuntimeError(f"worker {name} failed:\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def numba_start_times(workdir: Path) -> dict:
    """Compile (empty cache) and cached-start times, each in a fresh process."""
    cache = workdir / "numba-cache-cold"
    cold = spawn("numba-start", workdir, cache_dir=cache)
    warm = spawn("numba-start", workdir, cache_dir=cache)
    return {"import_s": cold["import_s"], "compile_s": cold["first_call_s"] - cold["second_call_s"],
            "cached_start_s": warm["import_s"] + warm["first_call_s"],
            "cached_first_call_s": warm["first_call_s"]}


def agreement(workdir: Path, shape) -> dict:
    """Largest |ours / det J - other| away from the raw grid's edge, per other path."""
    out = workdir / "out"
    ours = np.load(out / "ours.npy") / np.load(out / "ours_jacobian.npy")
    # Output voxels whose sample point p + d(p) lies EDGE_VOXELS inside the raw grid.
    from nl_unwarp.io.itk import read_itk_field

    disp, _ = read_itk_field(workdir / "field.nii")
    pts = np.indices(shape, dtype=np.float32) + np.moveaxis(disp, -1, 0) / VOXEL_MM
    inner = np.all([(pts[a] >= EDGE_VOXELS) & (pts[a] <= n - 1 - EDGE_VOXELS)
                    for a, n in enumerate(shape)], axis=0)
    import nibabel as nib

    image_range = float(np.ptp(np.asarray(nib.load(str(workdir / "image.nii")).dataobj)))
    return {name: float(np.abs(ours - np.load(out / f"{name}.npy"))[inner].max()) / image_range
            for name in ("sitk-warp", "sitk-resample", "scipy")}


def measure(workdir: Path, shape, repeats: int) -> dict:
    info = prepare(workdir, shape)
    info["numba"] = numba_start_times(workdir)
    cache = workdir / "numba-cache-cold"  # warm by now
    runs: dict[str, list[dict]] = {name: [] for name in PATHS}
    for rep in range(repeats):
        for name in PATHS:
            runs[name].append(spawn(name, workdir, save=rep == 0, cache_dir=cache))
            print(f"  round {rep + 1}/{repeats}: {name:14s} {runs[name][-1]['seconds']:7.3f} s",
                  file=sys.stderr, flush=True)
    info["runs"] = runs
    info["agreement"] = agreement(workdir, shape)
    return info


def _median(values) -> float:
    return float(np.median(list(values)))


def machine() -> dict:
    import numba
    import scipy
    import SimpleITK as sitk

    return {"cpus": os.cpu_count(), "numba_threads": numba.config.NUMBA_NUM_THREADS,
            "OPENBLAS_CORETYPE": os.environ.get("OPENBLAS_CORETYPE"),
            "python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
            "numba": numba.__version__, "SimpleITK": sitk.Version.VersionString(),
            "load_average": os.getloadavg()}


def report(info: dict, shape, repeats: int) -> dict:
    """Print the table; return the figures as a dict."""
    runs = info["runs"]
    med = {name: _median(r["seconds"] for r in runs[name]) for name in PATHS}
    peak = {name: max(r["peak"] for r in runs[name]) for name in PATHS}
    gib = 1024**3
    print(f"\nnl_unwarp correction benchmark: {shape[0]} x {shape[1]} x {shape[2]} float32, "
          f"{VOXEL_MM:g} mm, invented degree-{info['degree']} coil (max |d| "
          f"{info['max_displacement_mm']:.2f} mm), median of {repeats}")
    print(f"{'path':52s} {'median s':>9s} {'best s':>7s}  {'runs s':<26s} {'peak RSS GiB':>12s}")
    for name in PATHS:
        seconds = [r["seconds"] for r in runs[name]]
        times = " ".join(f"{t:.2f}" for t in seconds)
        print(f"{LABELS[name]:52s} {med[name]:9.3f} {min(seconds):7.3f}  {times:<26s} "
              f"{peak[name] / gib:12.2f}")
        for step in runs[name][0].get("steps", {}):
            step_med = _median(r["steps"][step] for r in runs[name])
            print(f"  {STEP_LABELS[step]:50s} {step_med:9.3f}")
    best_sitk = min(med["sitk-warp"], med["sitk-resample"])
    ratio = med["ours-nii"] / best_sitk
    ratio_gz = med["ours-nii.gz"] / best_sitk
    ours_peak = max(peak["ours-nii"], peak["ours-nii.gz"])
    first = runs["ours-nii"][0]
    numba_t = info["numba"]
    if tuple(shape) != SHAPE_FULL:
        print("\nsmoke run: the targets are set for the full grid, where fixed costs matter less")
    print(f"\nratio ours (.nii) / fastest SimpleITK = {ratio:.2f} (target <= {TARGET_RATIO}): "
          f"{'met' if ratio <= TARGET_RATIO else 'NOT met'}")
    best = {name: min(r["seconds"] for r in runs[name]) for name in PATHS}
    print(f"ratio of the best runs, ours (.nii) / fastest SimpleITK = "
          f"{best['ours-nii'] / min(best['sitk-warp'], best['sitk-resample']):.2f}")
    print(f"ratio ours (.nii) / WarpImageFilter = {med['ours-nii'] / med['sitk-warp']:.2f}, "
          f"/ Resample = {med['ours-nii'] / med['sitk-resample']:.2f}, "
          f"ours (.nii.gz) / fastest SimpleITK = {ratio_gz:.2f}")
    print(f"peak memory of our path = {ours_peak / gib:.2f} GiB (target < {TARGET_PEAK_BYTES / gib:g} GiB): "
          f"{'met' if ours_peak < TARGET_PEAK_BYTES else 'NOT met'}; resident before the timed "
          f"section {first['rss_before'] / gib:.2f} GiB")
    print(f"warp interpolation error {first['interpolation_error_mm']:.2e} mm "
          f"(lattice {first['lattice_mm']:g} mm), Jacobian {first['jacobian_interpolation_error']:.2e}")
    print(f"numba: import {numba_t['import_s']:.2f} s, compile (empty cache) {numba_t['compile_s']:.1f} s, "
          f"cached start in a fresh process {numba_t['cached_start_s']:.2f} s (import + first tiny call)")
    agree = ", ".join(f"{k} {v:.1e}" for k, v in info["agreement"].items())
    print(f"agreement, max |ours / det J - other| / image range, {EDGE_VOXELS} voxels in from "
          f"the edge: {agree}")
    mach = machine()
    print(f"machine: {mach['cpus']} CPUs, numba threads {mach['numba_threads']}, SimpleITK threads "
          f"{runs['sitk-warp'][0]['threads']}, OPENBLAS_CORETYPE={mach['OPENBLAS_CORETYPE']}, "
          f"load average {', '.join(f'{v:.1f}' for v in mach['load_average'])}")
    return {"shape": list(shape), "repeats": repeats, "median_s": med, "peak_bytes": peak,
            "ratio_vs_fastest_sitk": ratio, "ratio_gz_vs_fastest_sitk": ratio_gz,
            "machine": mach, **info}


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--quick", action="store_true",
                   help=f"smoke run on a {' x '.join(map(str, SHAPE_QUICK))} grid")
    p.add_argument("--repeats", type=int, default=3, help="repetitions per path (default: 3)")
    p.add_argument("--workdir", help="folder for inputs and outputs (default: a temporary one)")
    p.add_argument("--json", help="also write the figures to this JSON file")
    p.add_argument("--worker", choices=PATHS + ("numba-start",), help=argparse.SUPPRESS)
    p.add_argument("--save", action="store_true", help=argparse.SUPPRESS)
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    if args.worker:
        print(json.dumps(run_worker(args.worker, Path(args.workdir), args.save)))
        return 0
    shape = SHAPE_QUICK if args.quick else SHAPE_FULL
    with tempfile.TemporaryDirectory(prefix="nlu-bench-") as tmp:
        workdir = Path(args.workdir) if args.workdir else Path(tmp)
        figures = report(measure(workdir, shape, args.repeats), shape, args.repeats)
    if args.json:
        Path(args.json).write_text(json.dumps(figures, indent=2, default=str) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
