"""Every file name of our derivatives, in one place.

BIDS has no settled naming for transforms yet: the field follows the
``from-``/``to-``/``mode-image``/``_xfm`` pattern in use by derivatives today.
Should the standard settle on another, only this module changes.

A derivative keeps the source's entities and folder, and adds ``desc-``:

========================  ===================================================
corrected image           ``<entities>_desc-gnc_<suffix>.nii.gz``
displacement field (ITK)  ``<entities>_from-<suffix>orig_to-<suffix>gnc_mode-image_xfm.nii.gz``
Jacobian determinant      ``<entities>_desc-gncjacobian_<suffix>.nii.gz``
displacement magnitude    ``<entities>_desc-gncdisplacement_<suffix>.nii.gz``
coil tensor (dwi)         ``<entities>_desc-gnccoiltensor_<suffix>.nii.gz``
b-value deviation (dwi)   ``<entities>_desc-gncbdeviation_<suffix>.nii.gz``
========================  ===================================================

``orig`` is the grid as the scanner reconstructed it, ``gnc`` the corrected one.
"""

from __future__ import annotations

import re
from pathlib import PurePosixPath

__all__ = ["DESC", "KINDS", "derivative_name", "split_bids_name"]

#: desc- label of corrected images.
DESC = "gnc"
#: Kinds of derivative file, each with its name template.
KINDS = {
    "corrected": "{prefix}_desc-" + DESC + "_{suffix}{ext}",
    "field": "{prefix}_from-{suffix}orig_to-{suffix}" + DESC + "_mode-image_xfm{ext}",
    "jacobian": "{prefix}_desc-" + DESC + "jacobian_{suffix}{ext}",
    "magnitude": "{prefix}_desc-" + DESC + "displacement_{suffix}{ext}",
    "coiltensor": "{prefix}_desc-" + DESC + "coiltensor_{suffix}{ext}",
    "bdeviation": "{prefix}_desc-" + DESC + "bdeviation_{suffix}{ext}",
}
_NAME = re.compile(r"^(?P<prefix>sub-[A-Za-z0-9]+(?:_[a-z]+-[A-Za-z0-9]+)*)_(?P<suffix>[A-Za-z0-9]+)"
                   r"(?P<ext>(?:\.[A-Za-z0-9]+)+)$")


def split_bids_name(name: str) -> tuple[str, str, str]:
    """``sub-01_ses-a_T1w.nii.gz`` -> (``sub-01_ses-a``, ``T1w``, ``.nii.gz``)."""
    found = _NAME.match(name)
    if not found:
        raise ValueError(f"{name!r} is not a BIDS file name (sub-<label>[_<key>-<value>]..._<suffix>.<ext>)")
    return found["prefix"], found["suffix"], found["ext"]


def derivative_name(source_relpath: str, kind: str, *, ext: str | None = None) -> str:
    """Relative path of a derivative of a source image (same folder as the source).

    Parameters
    ----------
    source_relpath : str
        Source image path relative to its dataset (POSIX separators).
    kind : {"corrected", "field", "jacobian", "magnitude"}
    ext : str, optional
        Extension to use instead of the image's (``.json`` for sidecars).
    """
    rel = PurePosixPath(source_relpath)
    prefix, suffix, image_ext = split_bids_name(rel.name)
    name = KINDS[kind].format(prefix=prefix, suffix=suffix, ext=ext or image_ext)
    return str(rel.with_name(name))
