"""Coordinate frames: world RAS+ millimetres and the gradient-coil device frame.

Every sign flip and axis swap between the patient (world) frame and the device
frame lives here.

Conventions (see ``CONVENTIONS.md`` of the project and ``docs/conventions.md``):

* world: NIfTI RAS+ mm, as ``img.affine`` gives;
* LPS = diag(-1, -1, 1) RAS (DICOM patient frame, PS3.3 C.7.6.2.1.1);
* device: the gradient coils' axes, origin at the gradient isocenter, mm. It
  coincides with the DICOM patient LPS frame for a head-first-supine patient
  (common practice, from memory);
* ``r_device = R(position) @ p_lps + offset_device``, with the table position
  (BIDS ``TablePosition``) giving ``offset_device = (-tp1, -tp2, tp3)``
  (derived from the BIDS definition and the HFS convention; overridable by
  the caller).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "LPS_FROM_RAS",
    "PATIENT_POSITIONS",
    "DeviceFrame",
    "offset_from_table_position",
    "rotation_for_position",
]

#: diag(-1, -1, 1): RAS <-> LPS, its own inverse (DICOM PS3.3 C.7.6.2.1.1 vs NIfTI-1).
LPS_FROM_RAS = np.diag([-1.0, -1.0, 1.0])

#: Rotation R with ``device = R @ patient_lps`` for each DICOM PatientPosition
#: (DICOM PS3.3 C.7.3.1.1.2 defines the positions; the matrices are derived
#: from them with the HFS device convention above: from memory, tested for
#: det = +1 and against a geometric construction in the tests).
PATIENT_POSITIONS: dict[str, np.ndarray] = {
    "HFS": np.diag([1.0, 1.0, 1.0]),
    "HFP": np.diag([-1.0, -1.0, 1.0]),
    "FFS": np.diag([-1.0, 1.0, -1.0]),
    "FFP": np.diag([1.0, -1.0, -1.0]),
    "HFDR": np.array([[0.0, 1.0, 0.0], [-1.0, 0.0, 0.0], [0.0, 0.0, 1.0]]),
    "HFDL": np.array([[0.0, -1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 1.0]]),
    "FFDR": np.array([[0.0, -1.0, 0.0], [-1.0, 0.0, 0.0], [0.0, 0.0, -1.0]]),
    "FFDL": np.array([[0.0, 1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, -1.0]]),
}


def rotation_for_position(position: str) -> np.ndarray:
    """Return R (3 x 3) with ``device = R @ patient_lps`` for a patient position.

    Parameters
    ----------
    position : str
        DICOM PatientPosition code (HFS, HFP, FFS, FFP, HFDR, HFDL, FFDR, FFDL),
        case-insensitive.

    Returns
    -------
    (3, 3) ndarray
        A new array (callers may modify it).
    """
    key = position.strip().upper()
    if key not in PATIENT_POSITIONS:
        raise ValueError(
            f"unknown patient position {position!r}; expected one of "
            f"{', '.join(PATIENT_POSITIONS)}"
        )
    return PATIENT_POSITIONS[key].copy()


def offset_from_table_position(table_position_mm) -> np.ndarray:
    """Device-frame offset (mm) from a BIDS ``TablePosition``.

    Parameters
    ----------
    table_position_mm : sequence of 3 float
        BIDS TablePosition: for an observer in front of the scanner, a table
        moving left, up or into the bore increases the 1st, 2nd, 3rd value.

    Returns
    -------
    (3,) ndarray, mm
        ``(-tp1, -tp2, tp3)``: device x points to the observer's right (the
        left of a head-first-supine patient seen from the feet), device y
        down (posterior of a supine patient), device z into the bore.

    Notes
    -----
    The patient moves with the table, so the device coordinates of a point
    fixed to the patient shift by the table's motion. With the device frame
    equal to the patient LPS frame of a head-first-supine patient (from
    memory), the observer's left is device -x and up is device -y; the BIDS
    text (observer in front of the scanner, table moving left, up, into the
    bore increases values 1, 2, 3) then gives the signs above.
    """
    tp = np.asarray(table_position_mm, dtype=float).reshape(-1)
    if tp.shape != (3,) or not np.all(np.isfinite(tp)):
        raise ValueError(f"TablePosition must be three finite numbers in mm, got {table_position_mm!r}")
    return np.array([-tp[0], -tp[1], tp[2]])


class DeviceFrame:
    """Rigid map between world RAS mm and device mm.

    Parameters
    ----------
    position : str
        DICOM PatientPosition code.
    isocenter_offset_mm : (3,) array-like
        The isocenter offset: device coordinates (mm) of the world origin,
        i.e. ``t`` in ``r_device = R p_lps + t`` (from the table position by
        :func:`offset_from_table_position`, or given directly).

    Notes
    -----
    .. math::

        \\mathbf r_{device} = R\\, D\\, \\mathbf p_{ras} + \\mathbf t, \\qquad D = diag(-1, -1, 1)

    The isocenter (``r_device = 0``) sits in world at ``-D R^T t``.
    """

    def __init__(self, position: str = "HFS", isocenter_offset_mm=(0.0, 0.0, 0.0)) -> None:
        self.position = position.strip().upper()
        rotation = rotation_for_position(self.position)
        offset = np.asarray(isocenter_offset_mm, dtype=float).reshape(3)
        if not np.all(np.isfinite(offset)):
            raise ValueError(f"isocenter offset must be finite, got {isocenter_offset_mm!r}")
        self.isocenter_offset_mm = offset
        #: device-from-RAS rotation (3 x 3)
        self.device_from_ras = rotation @ LPS_FROM_RAS

    @property
    def ras_from_device(self) -> np.ndarray:
        """RAS-from-device rotation (3 x 3), the transpose of ``device_from_ras``."""
        return self.device_from_ras.T

    @property
    def isocenter_ras_mm(self) -> np.ndarray:
        """World RAS position (mm) of the gradient isocenter."""
        return self.ras_from_device @ (-self.isocenter_offset_mm)

    def to_device(self, points_ras_mm: np.ndarray) -> np.ndarray:
        """Map (..., 3) RAS points (mm) to device coordinates (mm)."""
        pts = np.asarray(points_ras_mm, dtype=float)
        return pts @ self.device_from_ras.T + self.isocenter_offset_mm

    def to_ras(self, points_device_mm: np.ndarray) -> np.ndarray:
        """Map (..., 3) device points (mm) to RAS (mm)."""
        pts = np.asarray(points_device_mm, dtype=float)
        return (pts - self.isocenter_offset_mm) @ self.device_from_ras

    def vectors_to_ras(self, vectors_device: np.ndarray) -> np.ndarray:
        """Rotate (..., 3) device vectors (displacements) into RAS."""
        return np.asarray(vectors_device, dtype=float) @ self.device_from_ras

    def affine_device_from_ras(self) -> np.ndarray:
        """4 x 4 homogeneous matrix mapping RAS mm to device mm."""
        out = np.eye(4)
        out[:3, :3] = self.device_from_ras
        out[:3, 3] = self.isocenter_offset_mm
        return out
