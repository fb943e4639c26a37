"""FSL-style b-value and b-vector files (BIDS ``.bval`` / ``.bvec``) and the frame of the b-vectors.

File format (BIDS, "Magnetic Resonance Imaging > Diffusion imaging data", from
memory): a ``.bval`` file holds one row of N space-separated b-values (s/mm^2);
a ``.bvec`` file holds three rows (x, y, z) of N numbers, the unit direction of
the diffusion gradient of each volume, ``0 0 0`` for b = 0 volumes. Following
FSL, the vectors are given in the frame of the image's voxel axes, not in the
scanner's device frame.

Frame (FSL FDT documentation and common practice, from memory): FSL treats
every image as if stored radiologically. When the voxel-to-world matrix has a
positive determinant (neurological storage, e.g. RAS-like), FSL flips the
first voxel axis, so the first b-vector component refers to the *reversed*
first voxel axis. With :math:`U` the voxel axes' unit directions in world RAS
and :math:`F = diag(-1, 1, 1)` if :math:`\\det M > 0` (else :math:`F = I`), a
b-vector :math:`g` has world direction :math:`U F g`. dipy applies no flip of
its own: it takes the vectors as they stand (``dipy.core.gradients``), so our
per-voxel vectors, written in the same frame as the input, keep whatever
convention the input had. Every flip lives in :func:`ras_from_bvec_frame`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import InputError
from .atomic import OutputSet

__all__ = [
    "BVEC_FRAME",
    "ORTHOGONALITY_TOL",
    "ras_from_bvec_frame",
    "read_bvals",
    "read_bvecs",
    "write_bvals",
    "write_bvecs",
]

#: How the sidecars name the b-vector frame.
BVEC_FRAME = ("image voxel axes as in BIDS/FSL bvec files: the first axis reversed when the "
              "affine's determinant is positive")
#: Largest |U^T U - I| accepted for the voxel axes' directions: the b-vector
#: frame must be a rotation (a sheared sform has no orthonormal image axes).
ORTHOGONALITY_TOL = 1e-4
#: A b-vector of a diffusion-weighted volume should be a unit vector; dipy's
#: ``gradient_table`` accepts norms within 1e-2 (its ``atol`` default).
UNIT_TOL = 1e-2


def _numbers(path: str | Path) -> list[list[float]]:
    src = str(path)
    if not Path(path).is_file():
        raise InputError(src, "file not found")
    try:
        text = Path(path).read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(src, "not a text file (expected numbers separated by spaces)") from None
    rows = []
    for number, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue
        try:
            rows.append([float(v) for v in line.replace(",", " ").split()])
        except ValueError:
            raise InputError(src, f"line {number}: not a list of numbers ({line.strip()[:40]!r})") from None
    if not rows:
        raise InputError(src, "empty file")
    return rows


def read_bvals(path: str | Path) -> np.ndarray:
    """Read a ``.bval`` file: (N,) float ndarray, s/mm^2.

    One row of N values (a single column is accepted too).
    """
    rows = _numbers(path)
    if len(rows) == 1:
        values = np.array(rows[0])
    elif all(len(r) == 1 for r in rows):
        values = np.array([r[0] for r in rows])
    else:
        raise InputError(str(path), f"expected one row of b-values, found {len(rows)} rows")
    if not np.all(np.isfinite(values)) or np.any(values < 0):
        raise InputError(str(path), "b-values must be finite and non-negative")
    return values


def read_bvecs(path: str | Path) -> np.ndarray:
    """Read a ``.bvec`` file: (N, 3) float ndarray (one row per volume).

    The file has three rows (x, y, z) of N values (BIDS); a file of N rows of
    three values is accepted when N != 3 (unambiguous). Non-zero vectors must
    be unit vectors within :data:`UNIT_TOL`.
    """
    rows = _numbers(path)
    if len({len(r) for r in rows}) != 1:
        raise InputError(str(path), "rows of different lengths")
    table = np.array(rows)
    if table.shape[0] == 3:
        vecs = table.T
    elif table.shape[1] == 3:
        vecs = table
    else:
        raise InputError(str(path), f"expected 3 rows (x, y, z) of N values, found a "
                                    f"{table.shape[0]} x {table.shape[1]} table")
    norms = np.linalg.norm(vecs, axis=1)
    bad = np.flatnonzero((norms > 0) & (np.abs(norms - 1) > UNIT_TOL))
    if bad.size:
        raise InputError(str(path), f"volume {int(bad[0])}: b-vector norm {norms[bad[0]]:.4f}; "
                                    "directions must be unit vectors (or 0 0 0 for b = 0)")
    return vecs


def write_bvals(outputs: OutputSet, path: str | Path, bvals: np.ndarray) -> Path:
    """Write a one-row ``.bval`` file (reserved in ``outputs``)."""
    text = " ".join(f"{float(v):.6g}" for v in np.asarray(bvals).ravel()) + "\n"
    outputs.reserve(path).write_text(text, encoding="utf-8")
    return Path(path)


def write_bvecs(outputs: OutputSet, path: str | Path, bvecs: np.ndarray) -> Path:
    """Write a three-row ``.bvec`` file from (N, 3) vectors (reserved in ``outputs``)."""
    vecs = np.asarray(bvecs, dtype=float).reshape(-1, 3)
    text = "".join(" ".join(f"{v:.8f}" for v in row) + "\n" for row in vecs.T)
    outputs.reserve(path).write_text(text, encoding="utf-8")
    return Path(path)


def ras_from_bvec_frame(affine: np.ndarray) -> np.ndarray:
    """Rotation (3 x 3) taking a b-vector of the BIDS/FSL frame to world RAS.

    Parameters
    ----------
    affine : (4, 4) ndarray
        The DWI's voxel -> RAS mm affine.

    Returns
    -------
    (3, 3) ndarray
        :math:`U F`: the voxel axes' unit directions (columns of the affine
        divided by the voxel sizes) times :math:`F = diag(-1, 1, 1)` when
        :math:`\\det M > 0`, else the identity (FSL convention, from memory;
        see the module notes). A proper or improper orthogonal matrix.

    Raises
    ------
    ValueError
        If the voxel axes are not orthogonal (a sheared affine).
    """
    m = np.asarray(affine, dtype=float)[:3, :3]
    units = m / np.linalg.norm(m, axis=0)
    err = float(np.max(np.abs(units.T @ units - np.eye(3))))
    if err > ORTHOGONALITY_TOL:
        raise ValueError(f"the affine's voxel axes are not orthogonal (|U^T U - I| = {err:.2e}): "
                         "b-vectors have no orthonormal image frame; reslice to a non-sheared grid")
    flip = np.diag([-1.0, 1.0, 1.0]) if np.linalg.det(m) > 0 else np.eye(3)
    return units @ flip
