#!/usr/bin/env python
"""Benchmark: a field-sample fit of 3 axes x 20,000 samples to degree 15.

Inputs, made here: for each gradient axis its own 20,000 seeded random positions in a ball of
radius 150 mm (as voxels of three field maps would be), and encoded positions from an invented
degree-15 model (odd degrees, ``NLU-Bench Fifteen``-like, **fictional**) plus 1 um of seeded
noise.

Timed, repetitions interleaved (the table shows the median, and the minimum):

``ours, degree 15``   ``nl_unwarp.fit.fit_samples(degree=15)``: harmonic tables, the QR of the
                      degree-17 design (the degree-15 fit and the degree-17 comparison fit
                      from one factorisation), leave-one-out residuals, the predicted error on
                      spheres, warnings. Target: **< 5 s**.
``ours, auto``        the same with the degree chosen by leave-one-out cross-validation up to 15.
``ours, shared``      degree 15 with one position set for the three axes (one harmonic table).
``numpy lstsq``       the peer: ``numpy.linalg.lstsq`` (SVD) on the same three degree-15 design
                      matrices (column-normalised, built outside the timed section): the solve
                      alone, without anything the summary needs.
``... 1 BLAS thread`` ours (degree 15) and the peer with BLAS limited to one thread
                      (threadpoolctl): on a loaded shared machine, threaded BLAS can be
                      several times slower than one thread, and these rows stay comparable.

Run::

    python benchmarks/bench_fit.py [--samples 20000] [--degree 15] [--repeats 3] [--json figures.json]

Nothing here asserts: the figures are printed (and written as JSON).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import time

import numpy as np

try:  # BLAS thread limits for the single-thread rows (threadpoolctl, when installed)
    from threadpoolctl import threadpool_limits
except ImportError:  # pragma: no cover
    threadpool_limits = None

from nl_unwarp.coil import AXES, LINEAR_TERMS
from nl_unwarp.fit import design_matrix, fit_samples, fit_terms

SEED = 20261202
RADIUS_MM = 150.0
NOISE_MM = 1e-3
TARGET_S = 5.0


def invented_model(rng, degree: int) -> dict:
    """Odd-degree coefficients decaying with the degree (fictional)."""
    coefficients = {}
    for name in AXES:
        alpha = np.zeros((degree + 1, degree + 1))
        beta = np.zeros_like(alpha)
        for kind, n, m in fit_terms(degree):
            if n % 2:
                (alpha if kind == "cos" else beta)[n, m] = rng.normal(scale=0.02 * 0.6 ** n)
        kind, n, m = LINEAR_TERMS[name]
        (alpha if kind == "cos" else beta)[n, m] = 1.0
        coefficients[name] = (alpha, beta)
    return coefficients


def make_samples(count: int, degree: int, *, shared: bool) -> dict:
    from nl_unwarp.harmonics import expansion

    rng = np.random.default_rng(SEED)
    model = invented_model(rng, degree)
    samples = {}
    base = None
    for name in AXES:
        if base is None or not shared:
            v = rng.normal(size=(count, 3))
            radius = RADIUS_MM * rng.uniform(0, 1, (count, 1)) ** (1 / 3)
            base = v / np.linalg.norm(v, axis=1, keepdims=True) * radius
        value = RADIUS_MM * expansion(base / RADIUS_MM, *model[name], gradient=False)[0]
        samples[name] = (base, value + rng.normal(scale=NOISE_MM, size=count))
    return samples


def timed(fn) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[1])
    p.add_argument("--samples", type=int, default=20000)
    p.add_argument("--degree", type=int, default=15)
    p.add_argument("--repeats", type=int, default=3)
    p.add_argument("--json", help="write the figures here")
    args = p.parse_args()

    separate = make_samples(args.samples, args.degree, shared=False)
    shared = make_samples(args.samples, args.degree, shared=True)
    terms = fit_terms(args.degree)
    designs = {}
    for name in AXES:
        d = design_matrix(separate[name][0], terms, reference_radius_mm=RADIUS_MM)
        designs[name] = d / np.linalg.norm(d, axis=0)

    def lstsq():
        return {name: np.linalg.lstsq(designs[name], separate[name][1], rcond=None)[0] for name in AXES}

    def one_thread(fn):
        def run():
            with threadpool_limits(limits=1, user_api="blas"):
                return fn()
        return run

    def ours():
        return fit_samples(separate, degree=args.degree, reference_radius_mm=RADIUS_MM)

    runs = {
        "ours, degree 15": ours,
        "ours, auto": lambda: fit_samples(separate, max_degree=args.degree, reference_radius_mm=RADIUS_MM),
        "ours, shared": lambda: fit_samples(shared, degree=args.degree, reference_radius_mm=RADIUS_MM),
        "numpy lstsq": lstsq,
    }
    if threadpool_limits is not None:
        runs["ours, 1 BLAS thread"] = one_thread(ours)
        runs["lstsq, 1 BLAS thread"] = one_thread(lstsq)
    for fn in runs.values():  # warm-up: imports, first BLAS calls
        fn()
    times = {k: [] for k in runs}
    for _ in range(args.repeats):
        for key, fn in runs.items():
            times[key].append(timed(fn))

    model, summary = fit_samples(separate, degree=args.degree, reference_radius_mm=RADIUS_MM)
    reference = lstsq()
    agreement = 0.0
    for name in AXES:
        ax = model.axes[name]
        norms = np.linalg.norm(design_matrix(separate[name][0], terms, reference_radius_mm=RADIUS_MM), axis=0)
        ours = np.array([(ax.alpha if k == "cos" else ax.beta)[n, m] for k, n, m in terms])
        agreement = max(agreement, float(np.max(np.abs(ours - reference[name] / norms))))

    medians = {k: statistics.median(v) for k, v in times.items()}
    print(f"field-sample fit: 3 axes x {args.samples} samples, degree {args.degree} "
          f"({len(terms)} terms per axis), {args.repeats} repetitions")
    print(f"machine: {os.cpu_count()} CPUs, load average {', '.join(f'{x:.2f}' for x in os.getloadavg())}, "
          f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}, "
          f"OMP_NUM_THREADS={os.environ.get('OMP_NUM_THREADS', 'unset')}")
    print(f"{'path':22} {'median (s)':>11} {'min (s)':>9} {'/ lstsq':>8}  (1-thread rows: / 1-thread lstsq)")
    for key in runs:
        peer = "lstsq, 1 BLAS thread" if "1 BLAS" in key else "numpy lstsq"
        print(f"{key:22} {medians[key]:11.3f} {min(times[key]):9.3f} {medians[key] / medians[peer]:8.2f}")
    for key, how in (("ours, 1 BLAS thread", "as `nl-unwarp fit samples` runs it"),
                     ("ours, degree 15", "default BLAS threads")):
        if key in medians:
            verdict = "meets" if medians[key] < TARGET_S else "misses"
            print(f"target: degree-15 fit < {TARGET_S:g} s, {how}: {verdict} it "
                  f"({medians[key] / TARGET_S:.2f} of the target)")
    print(f"agreement with lstsq: largest coefficient difference {agreement:.2e}")
    print(f"fit: residual rms {max(a.residual_rms_mm for a in summary.axes.values()):.2e} mm "
          f"(noise {NOISE_MM:g} mm), predicted error inside {summary.predicted_error_max_mm:.2e} mm")
    if args.json:
        with open(args.json, "w", encoding="utf-8") as f:
            json.dump({"samples": args.samples, "degree": args.degree, "times_s": times,
                       "medians_s": medians, "target_s": TARGET_S, "agreement": agreement,
                       "load_average": os.getloadavg()}, f, indent=2)


if __name__ == "__main__":
    main()
