"""Fiducial markers in a phantom scan: detection, sub-voxel centroids, matching, rigid fits.

Detection finds small bright blobs on a smooth background (the phantom body):

1. the background is a grey-scale opening of the lightly smoothed image with a
   box wider than a marker (a bright blob narrower than the box is removed, the
   body stays);
2. the smoothed excess over it is thresholded at a fraction of the markers'
   typical peak (and above the noise), and the connected components
   are labelled (``scipy.ndimage.label``, 26-connectivity);
3. components are gated by size (equivalent diameter against the definition's)
   and shape (ratio of the principal second moments), which rejects noise
   spikes, rods, sheets and large bright structures;
4. each centroid is the excess-weighted mean position of the (unsmoothed)
   voxels within a ball around the component, re-centred twice.

For a spherical marker and an encoding that is a harmonic function (the
:math:`B_z` of a coil in its source-free interior is), the continuous
excess-weighted centroid of the distorted blob is exactly the encoded position
of the marker's centre: the image holds :math:`f(\\mathbf r)/\\det J` at
:math:`\\mathbf u(\\mathbf r)`, so the centroid is the mean of :math:`\\mathbf u`
over the ball, and the mean of a harmonic function over a ball is its value at
the centre (mean value property; Evans, *Partial Differential Equations*,
2nd ed., 2010, section 2.2.2, from memory). What remains is sampling and noise.

Matching assigns detections to the markers of a definition, given an initial
pose: iterated mutual nearest neighbours within a gate, each round followed by
a robust rigid fit (weighted Kabsch/Umeyama with Tukey biweights) and the
removal of pairs left far apart by it. Missing markers and spurious detections
are simply left unmatched; a spurious blob that sits where a marker is missing
is matched, and the robust loss of the fit then down-weights it.

This module is pure math: arrays and affines in, arrays out.

References
----------
.. [1] Kabsch, W. (1976). A solution for the best rotation to relate two sets
   of vectors. Acta Cryst. A32, 922-923 (from memory).
.. [2] Umeyama, S. (1991). Least-squares estimation of transformation
   parameters between two point patterns. IEEE TPAMI 13(4), 376-380 (from
   memory): the determinant correction that keeps the result a rotation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage
from scipy.spatial import cKDTree

__all__ = [
    "Detections",
    "Match",
    "RigidPose",
    "detect_markers",
    "kabsch",
    "match_any_orientation",
    "match_markers",
    "proper_rotations_24",
    "robust_rigid_fit",
    "smallest_spacing_mm",
]

#: Threshold of the excess image, as a fraction of the median blob peak: the
#: component then covers about the inner half of a marker's profile.
THRESHOLD_FRACTION = 0.35
#: ... and at least this many robust noise standard deviations above zero.
THRESHOLD_NOISE_SIGMAS = 5.0
#: Accepted equivalent diameter of a thresholded component, as a fraction of the
#: typical (low end) and largest (high end) marker diameter: the threshold keeps
#: about 0.8-1.1 of a marker's diameter; a single 2 mm voxel (2.5 mm) is below
#: the low end for 6 mm markers.
DIAMETER_RANGE = (0.5, 1.6)
#: Largest ratio of the principal second moments (standard deviations) of a
#: component: a sphere sampled on a grid stays below about 1.5; rods and sheets
#: are far above.
ELONGATION_MAX = 2.0
#: Tukey biweight cut-off, in robust standard deviations (MAD * 1.4826): the
#: usual 95 % efficiency constant 4.685 (Huber & Ronchetti, Robust Statistics,
#: 2nd ed., 2009, from memory).
TUKEY_C = 4.685
#: Gate of the nearest-neighbour matching, as a fraction of the definition's
#: smallest marker spacing: beyond half of it a detection could be nearer to
#: another marker.
GATE_FRACTION = 0.4
#: After the rigid fit of a round, pairs farther apart than this fraction of the gate
#: are dropped (wrong pairs; the distortion left by a rigid fit stays well inside).
KEEP_FRACTION = 0.5


@dataclass(frozen=True)
class RigidPose:
    """A rigid map ``p = R q + t`` from the phantom frame to world RAS (mm).

    Attributes
    ----------
    rotation : (3, 3) ndarray
        Proper rotation ``R`` (det +1).
    translation_ras_mm : (3,) ndarray
        ``t``: world RAS position of the phantom frame's origin, mm.
    """

    rotation: np.ndarray
    translation_ras_mm: np.ndarray

    @classmethod
    def identity(cls) -> RigidPose:
        return cls(np.eye(3), np.zeros(3))

    def apply(self, points_phantom_mm: np.ndarray) -> np.ndarray:
        """World RAS (mm) of (..., 3) phantom-frame points (mm)."""
        return np.asarray(points_phantom_mm, float) @ self.rotation.T + self.translation_ras_mm

    def rotation_angle_deg(self) -> float:
        """Angle of the rotation, degrees.

        From its sine (half the norm of the antisymmetric part) and cosine (from the trace)
        with atan2: the arccos of the trace alone cannot tell angles below about 1e-6 degrees
        from rounding.
        """
        r = self.rotation
        sin = 0.5 * float(np.linalg.norm([r[2, 1] - r[1, 2], r[0, 2] - r[2, 0], r[1, 0] - r[0, 1]]))
        cos = (float(np.trace(r)) - 1.0) / 2.0
        return float(np.degrees(np.arctan2(sin, cos)))

    def compose_error(self, other: RigidPose) -> tuple[float, float]:
        """Rotation angle (deg) of ``R_self R_other^T`` and translation distance (mm)."""
        delta = RigidPose(self.rotation @ other.rotation.T, np.zeros(3))
        return delta.rotation_angle_deg(), float(np.linalg.norm(self.translation_ras_mm
                                                                - other.translation_ras_mm))


@dataclass
class Detections:
    """Blobs found in an image.

    Attributes
    ----------
    centroids_ras_mm : (K, 3) ndarray
        Sub-voxel, excess-weighted centroids of the accepted blobs, world RAS mm.
    diameters_mm : (K,) ndarray
        Equivalent diameter of each accepted thresholded component, mm.
    peaks : (K,) ndarray
        Largest smoothed excess of each blob.
    rejected : dict of str to int
        Components rejected, by reason (``"small"``, ``"large"``, ``"elongated"``).
    threshold : float
        The threshold used on the smoothed excess image.
    noise_sigma : float
        Robust noise standard deviation of the excess image.
    """

    centroids_ras_mm: np.ndarray
    diameters_mm: np.ndarray
    peaks: np.ndarray
    rejected: dict
    threshold: float
    noise_sigma: float


def _zooms(affine: np.ndarray) -> np.ndarray:
    return np.linalg.norm(np.asarray(affine, float)[:3, :3], axis=0)


def _background(image: np.ndarray, box_voxels: np.ndarray) -> np.ndarray:
    """Grey-scale opening: what is left when blobs narrower than the box are removed."""
    return ndimage.grey_opening(image, size=tuple(int(b) for b in box_voxels), mode="nearest")


def _noise_sigma(excess: np.ndarray) -> float:
    """Robust standard deviation of the excess image (MAD of its voxel-to-voxel differences)."""
    diff = np.diff(excess, axis=0).ravel()
    if diff.size > 2_000_000:
        diff = diff[:: diff.size // 2_000_000 + 1]
    # A difference of two independent samples has twice the variance.
    return float(1.4826 * np.median(np.abs(diff - np.median(diff))) / np.sqrt(2.0))


def _refine_centroid(excess: np.ndarray, affine: np.ndarray, start_ijk: np.ndarray, radius_mm: float,
                     iterations: int = 3) -> np.ndarray | None:
    """Excess-weighted centroid (voxel index) of the voxels within ``radius_mm`` of a moving centre."""
    zooms = _zooms(affine)
    metric = affine[:3, :3].T @ affine[:3, :3]
    half = np.ceil(radius_mm / zooms).astype(int) + 1
    centre = np.asarray(start_ijk, float)
    for _ in range(iterations):
        base = np.rint(centre).astype(int)
        lo = np.maximum(base - half, 0)
        hi = np.minimum(base + half + 1, excess.shape)
        if np.any(hi <= lo):
            return None
        block = excess[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]]
        grids = np.meshgrid(*[np.arange(a, b, dtype=float) for a, b in zip(lo, hi, strict=True)],
                            indexing="ij")
        rel = np.stack([g - c for g, c in zip(grids, centre, strict=True)], -1)
        dist2 = np.einsum("...i,ij,...j->...", rel, metric, rel)
        weight = np.where(dist2 <= radius_mm**2, np.clip(block, 0.0, None), 0.0)
        total = weight.sum()
        if total <= 0:
            return None
        centre = np.array([(g * weight).sum() / total for g in grids])
    return centre


def detect_markers(
    image: np.ndarray,
    affine: np.ndarray,
    *,
    marker_diameter_mm: float,
    largest_diameter_mm: float | None = None,
    expected_count: int | None = None,
    threshold: float | None = None,
    smoothing_mm: float | None = None,
) -> Detections:
    """Find bright spherical markers in a 3-D image.

    Parameters
    ----------
    image : (X, Y, Z) ndarray
        The scan (magnitude).
    affine : (4, 4) ndarray
        Voxel index -> world RAS mm.
    marker_diameter_mm : float
        Typical marker diameter (from the phantom definition), mm: sets the
        threshold's reference blobs and the lower end of the size gate.
    largest_diameter_mm : float, optional
        Largest marker diameter of the definition (default: the typical one):
        sets the background box, the centroid ball and the upper end of the
        size gate.
    expected_count : int, optional
        Number of markers in the definition: the threshold's reference is then
        the median of that many strongest candidate peaks (recommended; without
        it, of the peaks above half the 95th percentile, which needs markers to
        be most of the candidates).
    threshold : float, optional
        Threshold of the smoothed excess image; by default
        :data:`THRESHOLD_FRACTION` of the reference peak level, and at least
        :data:`THRESHOLD_NOISE_SIGMAS` noise standard deviations.
    smoothing_mm : float, optional
        Gaussian smoothing (standard deviation, mm) of the image for the
        background and the threshold (default: half the largest voxel
        spacing). The centroids are always taken from the unsmoothed image
        minus the background.

    Returns
    -------
    Detections
    """
    data = np.asarray(image, dtype=np.float32)
    if data.ndim != 3:
        raise ValueError(f"expected a 3-D image, got shape {data.shape}")
    affine = np.asarray(affine, float)
    zooms = _zooms(affine)
    if not marker_diameter_mm > 0:
        raise ValueError(f"marker diameter must be positive, got {marker_diameter_mm}")
    largest = max(float(largest_diameter_mm or marker_diameter_mm), float(marker_diameter_mm))
    # A box of two diameters (odd, in voxels) removes a marker wherever it sits in it.
    box = np.maximum(np.ceil((2.0 * largest) / zooms).astype(int) | 1, 3)
    sigma_mm = 0.5 * float(zooms.max()) if smoothing_mm is None else float(smoothing_mm)
    smooth = ndimage.gaussian_filter(data, sigma_mm / zooms, mode="nearest") if sigma_mm > 0 else data
    # The opening of the smoothed image: a minimum over the box is biased low by the
    # noise, less so after smoothing; the median excess measures what is left of it.
    background = _background(smooth, box)
    excess = data - background
    smooth = smooth - background
    noise = _noise_sigma(excess)
    floor = float(np.median(smooth)) + THRESHOLD_NOISE_SIGMAS * noise
    if threshold is None:
        # Candidate blobs: local maxima above the noise floor, of marker scale.
        size = tuple(int(b) for b in np.maximum(np.ceil(marker_diameter_mm / zooms).astype(int) | 1, 3))
        peaks = smooth[(smooth == ndimage.maximum_filter(smooth, size=size)) & (smooth > floor)]
        if peaks.size and expected_count:
            # The markers are the strongest peaks: the median of as many as there are markers.
            peaks = np.sort(peaks)[-int(expected_count):]
        elif peaks.size:
            # Without a count: the median of the peaks above half the 95th percentile (weak
            # maxima at the body's edge and a few bright intruders aside).
            peaks = peaks[peaks >= 0.5 * np.percentile(peaks, 95)]
        level = float(np.median(peaks)) if peaks.size else np.inf
        threshold = max(THRESHOLD_FRACTION * level, floor)
    labels, count = ndimage.label(smooth > threshold, structure=np.ones((3, 3, 3), bool))
    rejected = {"small": 0, "large": 0, "elongated": 0}
    empty = Detections(np.zeros((0, 3)), np.zeros(0), np.zeros(0), rejected, float(threshold), noise)
    if count == 0:
        return empty
    index = np.arange(1, count + 1)
    voxel_mm3 = abs(np.linalg.det(affine[:3, :3]))
    volumes = ndimage.sum_labels(np.ones_like(smooth), labels, index) * voxel_mm3
    diameters = np.cbrt(6.0 * volumes / np.pi)
    lo, hi = DIAMETER_RANGE[0] * marker_diameter_mm, DIAMETER_RANGE[1] * largest
    objects = ndimage.find_objects(labels)
    keep_centroids, keep_diam, keep_peaks = [], [], []
    for lab, (sl, diam) in enumerate(zip(objects, diameters, strict=True), start=1):
        if diam < lo:
            rejected["small"] += 1
            continue
        if diam > hi:
            rejected["large"] += 1
            continue
        mask = labels[sl] == lab
        ijk = np.argwhere(mask) + np.array([s.start for s in sl])
        pts = ijk @ affine[:3, :3].T
        if len(pts) >= 4:
            evals = np.linalg.eigvalsh(np.cov(pts.T))
            if np.sqrt(max(evals[-1], 1e-12) / max(evals[0], 1e-12)) > ELONGATION_MAX and \
                    np.sqrt(evals[-1]) > zooms.max():
                rejected["elongated"] += 1
                continue
        start = ijk.mean(0)
        centre = _refine_centroid(excess, affine, start, 0.5 * largest + 1.5 * zooms.max())
        if centre is None:
            rejected["small"] += 1
            continue
        keep_centroids.append(affine[:3, :3] @ centre + affine[:3, 3])
        keep_diam.append(diam)
        keep_peaks.append(float(smooth[sl][mask].max()))
    if not keep_centroids:
        return empty
    return Detections(np.array(keep_centroids), np.array(keep_diam), np.array(keep_peaks), rejected,
                      float(threshold), noise)


def kabsch(source: np.ndarray, target: np.ndarray, weights: np.ndarray | None = None) -> RigidPose:
    """Least-squares rotation and translation with ``target ~ R source + t`` (Kabsch/Umeyama).

    Parameters
    ----------
    source, target : (N, 3) ndarray
        Corresponding points (N >= 3, not collinear).
    weights : (N,) ndarray, optional
        Non-negative weights (default: equal).

    Returns
    -------
    RigidPose
        Minimises :math:`\\sum_i w_i |R s_i + t - y_i|^2` over proper rotations:
        SVD of the weighted cross-covariance with the determinant correction of
        Umeyama (1991), so a reflection is never returned.
    """
    src = np.asarray(source, float)
    dst = np.asarray(target, float)
    w = np.ones(len(src)) if weights is None else np.asarray(weights, float)
    if src.shape != dst.shape or src.ndim != 2 or src.shape[1] != 3 or w.shape != (len(src),):
        raise ValueError(f"expected matching (N, 3) point sets and (N,) weights, got {src.shape}, "
                         f"{dst.shape}, {w.shape}")
    if np.count_nonzero(w > 0) < 3:
        raise ValueError("a rigid fit needs at least three points with positive weight")
    w = w / w.sum()
    mu_s, mu_d = w @ src, w @ dst
    cov = ((dst - mu_d) * w[:, None]).T @ (src - mu_s)
    u, _, vt = np.linalg.svd(cov)
    d = np.sign(np.linalg.det(u @ vt)) or 1.0
    rot = u @ np.diag([1.0, 1.0, d]) @ vt
    return RigidPose(rot, mu_d - rot @ mu_s)


def robust_rigid_fit(source: np.ndarray, target: np.ndarray, *, iterations: int = 10,
                     scale_floor_mm: float = 0.05) -> tuple[RigidPose, np.ndarray]:
    """Rigid fit resistant to wrong pairs: iteratively reweighted Kabsch with Tukey biweights.

    Parameters
    ----------
    source, target : (N, 3) ndarray
        Putative pairs; some may be wrong.
    iterations : int
        Reweighting rounds.
    scale_floor_mm : float
        Lower bound of the robust residual scale (so exact data do not make
        every weight but the best zero).

    Returns
    -------
    RigidPose
    weights : (N,) ndarray
        Final biweights in [0, 1]; zero marks a rejected pair.
    """
    src = np.asarray(source, float)
    dst = np.asarray(target, float)
    w = np.ones(len(src))
    pose = kabsch(src, dst)
    for _ in range(iterations):
        res = np.linalg.norm(pose.apply(src) - dst, axis=1)
        scale = max(1.4826 * float(np.median(res)), scale_floor_mm)
        z = res / (TUKEY_C * scale)
        w = np.where(z < 1.0, (1.0 - z**2) ** 2, 0.0)
        if np.count_nonzero(w) < 3:
            break
        pose = kabsch(src, dst, w)
    return pose, w


@dataclass
class Match:
    """Detections matched to the markers of a definition.

    Attributes
    ----------
    marker_index : (M,) int ndarray
        Index of each matched marker in the definition.
    detection_index : (M,) int ndarray
        Index of its detection.
    pose : RigidPose
        Robust rigid fit of the matched pairs (phantom frame -> RAS).
    residual_mm : (M,) ndarray
        Distance of each pair after the rigid fit (distortion included), mm.
    unmatched_markers, unmatched_detections : int
        Markers with no detection within the gate (missing), and detections
        left over (spurious).
    gate_mm : float
        Gate of the last round, mm.
    """

    marker_index: np.ndarray
    detection_index: np.ndarray
    pose: RigidPose
    residual_mm: np.ndarray
    unmatched_markers: int
    unmatched_detections: int
    gate_mm: float


def smallest_spacing_mm(points_mm: np.ndarray) -> float:
    """Smallest distance between two of the (N, 3) points, mm."""
    dist, _ = cKDTree(points_mm).query(points_mm, k=2)
    return float(dist[:, 1].min())


def _mutual_pairs(pred: np.ndarray, tree: cKDTree, detections: np.ndarray, gate_mm: float):
    """Mutual nearest neighbours within the gate: (marker index, detection index)."""
    dist, det_idx = tree.query(pred, distance_upper_bound=gate_mm)
    ok = np.isfinite(dist)
    _, back = cKDTree(pred).query(detections)
    mk = np.nonzero(ok)[0]
    mk = mk[back[det_idx[mk]] == mk]
    return mk, det_idx[mk]


def match_markers(
    definition_mm: np.ndarray,
    detections_ras_mm: np.ndarray,
    initial_pose: RigidPose,
    *,
    gate_mm: float | None = None,
    rounds: int = 8,
) -> Match:
    """Match detections to definition markers, starting from a pose guess.

    Parameters
    ----------
    definition_mm : (N, 3) ndarray
        Marker centres in the phantom frame, mm.
    detections_ras_mm : (K, 3) ndarray
        Detected centroids, world RAS mm.
    initial_pose : RigidPose
        Guess of phantom frame -> RAS; it must be within about
        :data:`GATE_FRACTION` of a marker spacing (at the markers) of the truth.
    gate_mm : float, optional
        Largest marker-detection distance of a pair (default
        :data:`GATE_FRACTION` times the definition's smallest spacing).
    rounds : int
        Match-and-fit rounds.

    Returns
    -------
    Match

    Raises
    ------
    ValueError
        If fewer than four markers can be matched.
    """
    ref = np.asarray(definition_mm, float)
    det = np.asarray(detections_ras_mm, float)
    gate = GATE_FRACTION * smallest_spacing_mm(ref) if gate_mm is None else float(gate_mm)
    if len(det) < 4:
        raise ValueError(f"only {len(det)} markers detected; at least 4 are needed to match")
    tree = cKDTree(det)
    pose = initial_pose
    mk = di = np.zeros(0, int)
    for _ in range(rounds):
        new_mk, new_di = _mutual_pairs(pose.apply(ref), tree, det, gate)
        if len(new_mk) < 4:
            raise ValueError(f"only {len(new_mk)} markers lie within {gate:.3g} mm of a detection at "
                             "the initial pose; give a closer initial pose")
        pose, _ = robust_rigid_fit(ref[new_mk], det[new_di])
        # The biweights give the pose; pairs are kept out to half the gate, because the
        # distortion makes residuals systematic, not noise-like (a marker off the rigid
        # fit by a millimetre is still the right one).
        keep = np.linalg.norm(pose.apply(ref[new_mk]) - det[new_di], axis=1) <= KEEP_FRACTION * gate
        new_mk, new_di = new_mk[keep], new_di[keep]
        if np.array_equal(new_mk, mk) and np.array_equal(new_di, di):
            break
        mk, di = new_mk, new_di
    residual = np.linalg.norm(pose.apply(ref[mk]) - det[di], axis=1)
    return Match(mk, di, pose, residual, len(ref) - len(mk), len(det) - len(di), gate)


def proper_rotations_24() -> np.ndarray:
    """The 24 rotations that map the coordinate axes onto themselves (signed permutations, det +1)."""
    out = []
    for perm in ((0, 1, 2), (0, 2, 1), (1, 0, 2), (1, 2, 0), (2, 0, 1), (2, 1, 0)):
        for signs in np.ndindex(2, 2, 2):
            m = np.zeros((3, 3))
            for row, (col, s) in enumerate(zip(perm, signs, strict=True)):
                m[row, col] = -1.0 if s else 1.0
            if np.linalg.det(m) > 0:
                out.append(m)
    return np.array(out)


def match_any_orientation(
    definition_mm: np.ndarray,
    detections_ras_mm: np.ndarray,
    *,
    base_rotation: np.ndarray | None = None,
    gate_mm: float | None = None,
) -> Match:
    """Match with no pose guess but the phantom's axes being roughly along the world's.

    Tries the 24 axis-aligned orientations (composed with ``base_rotation``)
    with the translation that puts the definition's centroid on the
    detections' centroid, and keeps the match with the most pairs, then the
    smallest median residual. The phantom's asymmetric feature makes the
    right orientation the only one that matches every marker.
    """
    ref = np.asarray(definition_mm, float)
    det = np.asarray(detections_ras_mm, float)
    if len(det) < 4:
        raise ValueError(f"only {len(det)} markers detected; at least 4 are needed to match")
    base = np.eye(3) if base_rotation is None else np.asarray(base_rotation, float)
    best, best_key = None, None
    for rot in proper_rotations_24():
        r = rot @ base
        guess = RigidPose(r, det.mean(0) - r @ ref.mean(0))
        try:
            m = match_markers(ref, det, guess, gate_mm=gate_mm)
        except ValueError:
            continue
        key = (len(m.marker_index), -float(np.median(m.residual_mm)))
        if best_key is None or key > best_key:
            best, best_key = m, key
    if best is None:
        raise ValueError("no orientation of the phantom matches four or more detections")
    return best
