"""File-level glue for the resampling interface: image + ITK field (+ Jacobian map) -> image.

:func:`nl_unwarp.api.correct_file` recomputes the warp from a coil model; a
pipeline node that already has the field (from :class:`MakeWarp`) resamples
through it instead, so the warp is computed once per grid.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

__all__ = ["apply_field_file"]


def apply_field_file(source: str | Path, field: str | Path, corrected: str | Path, *,
                     jacobian_map: str | Path | None = None, order: int = 3,
                     fill: float = 0.0) -> Path:
    """Resample ``source`` through an ITK displacement field and write ``corrected``.

    The output grid is the field's grid; the Jacobian map, if given, must share it.
    """
    from ..errors import InputError
    from ..io.atomic import OutputSet
    from ..io.itk import read_itk_field
    from ..io.nifti import load_image, write_image
    from ..resample import correct_image
    from ..warp import WarpField

    image = load_image(source)
    disp_ras_mm, affine = read_itk_field(field)
    jac = None
    if jacobian_map is not None:
        jac_img = load_image(jacobian_map)
        if jac_img.spatial_shape != disp_ras_mm.shape[:3] or not np.allclose(jac_img.affine, affine,
                                                                              atol=1e-4):
            raise InputError(str(jacobian_map), "Jacobian map is not on the displacement field's grid")
        jac = np.asarray(jac_img.data[..., 0] if jac_img.data.ndim == 4 else jac_img.data, np.float32)
    data = image.data
    if np.issubdtype(data.dtype, np.integer):
        data = data.astype(np.float32)
    warp = WarpField(affine=affine, disp_ras_mm=disp_ras_mm,
                     jacobian=jac if jac is not None else np.ones(disp_ras_mm.shape[:3], np.float32),
                     outside_valid=np.zeros(disp_ras_mm.shape[:3], bool))
    result = correct_image(data, image.affine, warp, order=order, jacobian=jac is not None, fill=fill)
    with OutputSet() as out:
        write_image(out, corrected, result, affine, header=image.header)
    return Path(corrected)
