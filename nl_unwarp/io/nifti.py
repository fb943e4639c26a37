"""NIfTI images: strict loading and complete-or-nothing writing."""

from __future__ import annotations

import zlib
from pathlib import Path

import nibabel as nib
import numpy as np

from ..errors import InputError
from .atomic import OutputSet

__all__ = ["LoadedImage", "load_image", "write_image"]


class LoadedImage:
    """A validated image: data as (X, Y, Z[, T]), an affine and its header.

    Attributes
    ----------
    path : str
    data : ndarray
        As stored (no scaling applied beyond nibabel's), 3-D or 4-D; a 2-D file
        is given a third axis of length 1.
    affine : (4, 4) ndarray
        Voxel index -> RAS mm.
    header : nibabel header
    """

    def __init__(self, path: str, data: np.ndarray, affine: np.ndarray, header) -> None:
        self.path = path
        self.data = data
        self.affine = affine
        self.header = header

    @property
    def spatial_shape(self) -> tuple[int, int, int]:
        return tuple(self.data.shape[:3])


def _check_affine(affine: np.ndarray, src: str) -> None:
    if not np.all(np.isfinite(affine)):
        raise InputError(src, "affine (qform/sform) has non-finite entries")
    if abs(np.linalg.det(affine[:3, :3])) < 1e-9:
        raise InputError(src, "affine (qform/sform) is degenerate (zero determinant)")


def load_image(path: str | Path) -> LoadedImage:
    """Load a NIfTI image and check what the correction relies on.

    Raises
    ------
    InputError
        If the file is missing, unreadable or truncated, has no qform or sform
        (so the scanner position of the voxels is unknown), a degenerate
        affine, or more than four dimensions.
    """
    src = str(path)
    if not Path(path).exists():
        raise InputError(src, "image file not found")
    try:
        img = nib.load(src)
        data = np.asanyarray(img.dataobj)
    except (nib.filebasedimages.ImageFileError, EOFError, OSError, zlib.error, ValueError) as exc:
        raise InputError(src, f"unreadable or truncated NIfTI ({exc})") from None
    header = img.header
    if not isinstance(img, (nib.Nifti1Image, nib.Nifti2Image)):
        raise InputError(src, f"expected NIfTI-1 or NIfTI-2, got {type(img).__name__}")
    if int(header["qform_code"]) == 0 and int(header["sform_code"]) == 0:
        raise InputError(src, "header fields qform_code and sform_code are both 0: "
                              "the scanner position of the voxels is unknown")
    affine = np.asarray(img.affine, dtype=float)
    _check_affine(affine, src)
    if data.ndim == 2:
        data = data[:, :, None]
    if data.ndim > 4:
        raise InputError(src, f"header field dim: {data.ndim}-D data; give a 3-D or 4-D image")
    return LoadedImage(src, data, affine, header)


def write_image(outputs: OutputSet, path: str | Path, data: np.ndarray, affine: np.ndarray,
                *, header=None, intent: str | None = None) -> Path:
    """Write a NIfTI-1 image under a temporary name reserved in ``outputs``.

    qform and sform are both set to ``affine`` with code 1 (scanner), so that
    nibabel and ITK read the same geometry (CONVENTIONS.md section 1, verified
    by the project's transform tests).
    """
    hdr = header.copy() if header is not None else None
    img = nib.Nifti1Image(data, affine, header=hdr)
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    img.header.set_data_dtype(data.dtype)
    if hdr is not None:
        # Scaling of the source would re-scale our float output.
        img.header.set_slope_inter(None, None)
    if intent is not None:
        img.header.set_intent(intent)
    tmp = outputs.reserve(path)
    nib.save(img, str(tmp))
    return Path(path)
