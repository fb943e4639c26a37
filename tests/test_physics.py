"""End-to-end physics: distort a phantom with Biot-Savart coils, fit a model, correct.

The truth is the field of real current paths (magpylib: Golay saddles for x and y,
a Maxwell pair for z; see ``tests/coils.py``). A linear-gradient reconstruction
places the signal from r at u(r) = Bz(r) / G. The phantom is forward-simulated
through that encoding on an oblique, anisotropic grid with a feet-first patient and a
table offset; a harmonic model is fitted to Biot-Savart samples on a sphere, and the
raw image is corrected with it. Marker centroids and the intensity of uniform
regions are compared with the phantom's truth. The y saddles sit on a larger radius
than the x saddles, so the x/y swap of the patient position is not a symmetry of the
coils: a wrong frame shows (negative control at the end).
"""

from __future__ import annotations

import numpy as np
import pytest
from coils import AXES, LatticeEncoder, coil_set, encode_direct
from scipy.spatial.transform import Rotation

from nl_unwarp.fit import fit_coil
from nl_unwarp.frames import DeviceFrame, offset_from_table_position
from nl_unwarp.phantom import Phantom, forward_simulate, marker_centroids, region_means
from nl_unwarp.resample import correct_image
from nl_unwarp.warp import compute_warp, index_to_ras, lattice

pytestmark = pytest.mark.slow

#: Raw grid: 2 x 2 x 3 mm voxels, tilted 10 degrees about x (oblique), 248 x 248 x 252 mm.
SHAPE = (124, 124, 84)
ZOOMS_MM = np.array([2.0, 2.0, 3.0])
TILT_DEG = 10.0
PHANTOM_CENTRE_RAS_MM = np.array([3.0, -4.0, 5.0])
#: Feet-first, decubitus right: device axes are a signed permutation of the patient's.
POSITION = "FFDR"
#: BIDS TablePosition (mm): the isocenter is about 3 cm from the phantom centre.
TABLE_POSITION_MM = (6.0, 10.0, -25.0)

#: Biot-Savart lattice of the simulation: spacing and margin beyond the grid (room for
#: the displacements the inverse encoding iterates through), mm.
BIOT_SAVART_STEP_MM = 20.0
BIOT_SAVART_MARGIN_MM = 25.0
#: Largest accepted error of the interpolated Biot-Savart encoding where the phantom
#: has signal, mm (the project's warp tolerance: the simulated truth must be at least
#: as good as what is tested).
SIMULATION_TOL_MM = 1e-3
#: Signal reaches this far beyond the phantom's radius: five edge widths, where the
#: error-function profile is below 1e-11.
SIGNAL_MARGIN_MM = 10.0
#: In the corners of the lattice box (up to ~300 mm from the isocenter, near the wires)
#: the phantom is empty; there the simulation need only stay close (measured 7e-3 mm).
CORNER_TOL_MM = 0.02

#: Fit: degree, sampling sphere (radius = reference = valid radius), sample count.
FIT_DEGREE = 13
SAMPLING_RADIUS_MM = 170.0
FIT_SAMPLES = 2500
#: Model vs. Biot-Savart inside the valid radius: the truncation at degree 13 of a
#: series converging as (r / 0.37 m)^n leaves a few micrometres (measured 3e-3 mm).
MODEL_TOL_MM = 0.01

#: Marker centroids after correction (the foundation target), mm.
MARKER_TOL_MM = 0.1
#: Before correction the markers must be off by clearly more than that, mm.
MARKER_DISTORTED_MM = 0.5
#: Uniform-region means after correction (relative) and the least deviation
#: expected before it.
UNIFORMITY_TOL = 0.01
UNIFORMITY_DISTORTED = 0.03
#: Centroid window and probe radius, mm.
WINDOW_MM = 9.0
PROBE_RADIUS_MM = 5.0


def make_phantom() -> Phantom:
    # Edges of 2 mm keep the sampled centroids unbiased on 3 mm voxels (the truth image
    # gives its markers within 0.02 mm).
    return Phantom(center_ras_mm=tuple(PHANTOM_CENTRE_RAS_MM), radius_mm=115.0, marker_spacing_mm=35.0,
                   marker_radius_mm=5.0, marker_extent_mm=105.0, edge_mm=2.0)


def make_affine() -> np.ndarray:
    affine = np.eye(4)
    affine[:3, :3] = Rotation.from_euler("x", TILT_DEG, degrees=True).as_matrix() * ZOOMS_MM
    affine[:3, 3] = PHANTOM_CENTRE_RAS_MM - affine[:3, :3] @ ((np.array(SHAPE) - 1) / 2)
    return affine


def probe_centres(phantom: Phantom) -> np.ndarray:
    """Balls of uniform body between markers, 75-92 mm from the phantom centre."""
    h = phantom.marker_spacing_mm / 2
    offsets = h * np.array([[1, 1, 5], [1, 1, -5], [5, 1, 1], [-5, 1, -1], [1, 5, 1], [1, -5, 1],
                            [3, 3, 3], [-3, -3, -3], [3, -3, 3], [-3, 3, -3]])
    return offsets + np.asarray(phantom.center_ras_mm)


def sphere_samples(rng, count: int, radius_mm: float) -> np.ndarray:
    """Uniform random points on a sphere about the origin."""
    v = rng.normal(size=(count, 3))
    return radius_mm * v / np.linalg.norm(v, axis=1, keepdims=True)


def ball_points(rng, count: int, radius_mm: float) -> np.ndarray:
    """Uniform random points in a ball about the origin."""
    return sphere_samples(rng, count, radius_mm) * rng.uniform(0, 1, (count, 1)) ** (1 / 3)


@pytest.fixture(scope="module")
def scene():
    """Simulate, fit and correct once; the tests below read the results."""
    rng = np.random.default_rng(20260315)
    coils = coil_set()
    phantom, affine = make_phantom(), make_affine()
    frame = DeviceFrame(POSITION, offset_from_table_position(TABLE_POSITION_MM))
    # The simulation's own lattice (default spacing of forward_simulate) fixes the box the
    # Biot-Savart lattice must cover.
    steps, nodes = lattice(SHAPE, ZOOMS_MM, 6.0)
    grid_dev = frame.to_device(index_to_ras(affine, np.stack(np.meshgrid(*nodes, indexing="ij"), -1)
                                            .astype(float))).reshape(-1, 3)
    lower, upper = grid_dev.min(0) - BIOT_SAVART_MARGIN_MM, grid_dev.max(0) + BIOT_SAVART_MARGIN_MM
    encoder = LatticeEncoder(coils, lower, upper, BIOT_SAVART_STEP_MM)
    box_check = rng.uniform(lower, upper, (1500, 3))
    signal_check = frame.to_device(ball_points(rng, 1500, phantom.radius_mm + SIGNAL_MARGIN_MM)
                                   + PHANTOM_CENTRE_RAS_MM)
    raw = forward_simulate(phantom, encoder, SHAPE, affine, frame)

    points = sphere_samples(rng, FIT_SAMPLES, SAMPLING_RADIUS_MM)
    samples = {a: (points, coils[a].encoded_mm(points)) for a in AXES}
    model, reports = fit_coil(samples, degree=FIT_DEGREE, reference_radius_mm=SAMPLING_RADIUS_MM,
                              valid_radius_mm=SAMPLING_RADIUS_MM, label="Biot-Savart test coils")
    warp = compute_warp(model, SHAPE, affine, frame)
    corrected = correct_image(raw, affine, warp)
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in SHAPE], indexing="ij"), -1).astype(float)
    truth = phantom.intensity(index_to_ras(affine, ijk))
    return dict(coils=coils, encoder=encoder, box_check=box_check, signal_check=signal_check, raw=raw,
                model=model, reports=reports, warp=warp, corrected=corrected, truth=truth, phantom=phantom,
                affine=affine, frame=frame)


def test_simulated_encoding_is_biot_savart(scene):
    # Reference: direct magpylib evaluation, where the phantom has signal and in the whole box.
    signal = scene["encoder"].error_mm(scene["signal_check"])
    box = scene["encoder"].error_mm(scene["box_check"])
    print(f"interpolated Biot-Savart encoding: max error {signal.max():.2e} mm where the phantom "
          f"has signal, {box.max():.2e} mm in the whole lattice box")
    assert signal.max() < SIMULATION_TOL_MM
    assert box.max() < CORNER_TOL_MM


def test_fitted_model_matches_biot_savart_inside_the_valid_radius(scene):
    inside = ball_points(np.random.default_rng(11), 2000, SAMPLING_RADIUS_MM)
    model_mm, _ = scene["model"].encode(inside, jacobian=False)
    err = np.linalg.norm(model_mm - encode_direct(scene["coils"], inside), axis=1)
    for name, rep in scene["reports"].items():
        print(f"fit {name}: residual rms {rep.residual_rms_mm:.2e} mm, max {rep.residual_max_mm:.2e} mm, "
              f"condition {rep.condition_number:.2f}")
    print(f"model vs Biot-Savart inside the valid radius: max {err.max():.2e} mm")
    assert err.max() < MODEL_TOL_MM
    assert scene["model"].source["kind"] == "fit"


def test_markers_are_recovered(scene):
    phantom, affine, frame = scene["phantom"], scene["affine"], scene["frame"]
    markers = phantom.markers_ras_mm()
    reach = np.linalg.norm(frame.to_device(markers), axis=1) + WINDOW_MM
    assert reach.max() < SAMPLING_RADIUS_MM, "all markers must lie inside the valid radius"
    errors = {}
    for name in ("truth", "raw", "corrected"):
        found = marker_centroids(scene[name], affine, markers, window_mm=WINDOW_MM,
                                 background=phantom.body_value)
        errors[name] = np.linalg.norm(found - markers, axis=1)
        print(f"{name}: marker error max {errors[name].max():.3f} mm, mean {errors[name].mean():.3f} mm "
              f"({len(markers)} markers)")
    assert np.all(np.isfinite(errors["corrected"]))
    assert errors["corrected"].max() < MARKER_TOL_MM
    assert errors["raw"].max() > MARKER_DISTORTED_MM


def test_uniform_regions_are_restored(scene):
    phantom, affine = scene["phantom"], scene["affine"]
    centres = probe_centres(phantom)
    deviation = {}
    for name in ("truth", "raw", "corrected"):
        means = region_means(scene[name], affine, centres, radius_mm=PROBE_RADIUS_MM)
        deviation[name] = np.abs(means / phantom.body_value - 1.0)
        print(f"{name}: uniform-region deviation max {deviation[name].max():.4f}")
    assert deviation["truth"].max() < 1e-3, "probes must sit in the uniform body"
    assert deviation["corrected"].max() < UNIFORMITY_TOL
    assert deviation["raw"].max() > UNIFORMITY_DISTORTED


def test_warp_is_within_its_own_tolerance(scene):
    warp = scene["warp"]
    print(f"warp lattice {warp.lattice_mm} mm, interpolation error {warp.interpolation_error_mm:.2e} mm; "
          f"outside valid radius {warp.outside_fraction:.1%} of voxels")
    assert warp.interpolation_error_mm < SIMULATION_TOL_MM


def test_a_wrong_frame_is_detected(scene):
    # Negative control: the same model applied as if the patient were head-first supine at
    # the isocenter leaves the markers about a millimetre off.
    phantom, affine = scene["phantom"], scene["affine"]
    warp = compute_warp(scene["model"], SHAPE, affine, DeviceFrame("HFS"))
    wrong = correct_image(scene["raw"], affine, warp)
    markers = phantom.markers_ras_mm()
    found = marker_centroids(wrong, affine, markers, window_mm=WINDOW_MM, background=phantom.body_value)
    error = np.linalg.norm(found - markers, axis=1).max()
    print(f"corrected in the wrong frame (HFS, no offset): marker error max {error:.3f} mm")
    assert error > MARKER_DISTORTED_MM
