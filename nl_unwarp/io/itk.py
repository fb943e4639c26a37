"""ITK/ANTs displacement fields stored as NIfTI.

Facts (CONVENTIONS.md section 4, verified there with SimpleITK 2.5 / ITK 5.4
and antspyx 0.6; the project's tests re-check them with SimpleITK and antspyx):

* shape (X, Y, Z, 1, 3), float32, intent code 1007 ("vector");
* vectors in world LPS mm (ITK's frame), qform = sform = grid affine, code 1;
* for a point p of the field's grid, the moving (raw) image is sampled at
  ``p + d(p)``: exactly our pull-back displacement, converted RAS -> LPS.
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np

from ..compose import empty_interleaved
from ..errors import InputError
from ..frames import LPS_FROM_RAS
from .atomic import OutputSet
from .nifti import write_image

__all__ = ["read_itk_field", "write_itk_field"]

#: NIfTI intent code ``NIFTI_INTENT_VECTOR``. Not 1006 (displacement vector):
#: ITK >= 5.4 reads 1006 as RAS and older ITK as LPS (CONVENTIONS.md).
INTENT_VECTOR = 1007


def _ras_lps(vectors: np.ndarray) -> np.ndarray:
    """RAS <-> LPS for (..., 3) vectors (a new array: the input is not touched)."""
    return vectors * np.diag(LPS_FROM_RAS).astype(vectors.dtype)


def write_itk_field(outputs: OutputSet, path: str | Path, disp_ras_mm: np.ndarray,
                    affine: np.ndarray) -> Path:
    """Write a displacement field (X, Y, Z, 3) in RAS mm as an ITK field file."""
    disp_lps = _ras_lps(np.asarray(disp_ras_mm, dtype=np.float32))
    data = disp_lps[:, :, :, None, :]
    return write_image(outputs, path, data, affine, intent="vector")


def read_itk_field(path: str | Path) -> tuple[np.ndarray, np.ndarray]:
    """Read an ITK field file; returns the (X, Y, Z, 3) RAS displacement (mm) and affine.

    The displacement is the first three channels of a voxel-interleaved block
    (:func:`nl_unwarp.compose.empty_interleaved`, fourth channel 1), the layout
    that the one-pass kernel reads four channels at a time; it is made in the
    one pass that converts LPS to RAS.
    """
    src = str(path)
    try:
        img = nib.load(src)
        data = np.asanyarray(img.dataobj)
    except (FileNotFoundError, nib.filebasedimages.ImageFileError, EOFError, OSError) as exc:
        raise InputError(src, f"cannot read displacement field ({exc})") from None
    if data.ndim != 5 or data.shape[3] != 1 or data.shape[4] != 3:
        raise InputError(src, f"header field dim: shape {data.shape} is not (X, Y, Z, 1, 3)")
    code = int(img.header["intent_code"])
    if code != INTENT_VECTOR:
        raise InputError(src, f"header field intent_code is {code}; expected {INTENT_VECTOR} (vector, LPS)")
    block = empty_interleaved(data.shape[:3])
    np.multiply(data[:, :, :, 0, :], np.diag(LPS_FROM_RAS).astype(np.float32), out=block[..., :3],
                casting="unsafe")
    block[..., 3] = 1.0
    return block[..., :3], np.asarray(img.affine, dtype=float)
