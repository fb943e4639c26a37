"""What the correction reads from an image's sidecar metadata.

The metadata dict is the image's sidecar after the BIDS inheritance principle
has been applied (pybids ``BIDSLayout.get_metadata``: the sidecars of the
image's folder and its parents, the nearest one winning key by key). Key names
come from the site configuration (``metadata_keys``), defaulting to the BIDS
names.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from ..errors import InputError
from .siteconfig import IDENTITY_FIELDS, METADATA_KEYS

__all__ = ["PROVENANCE_KEY", "ImageMetadata", "correction_flag", "read_metadata"]

#: Sidecar key of our own provenance in every file we write. An input carrying
#: it is one of our outputs and is refused (never correct twice).
PROVENANCE_KEY = "NLUnwarpProvenance"
#: The mis-capitalised variant of the BIDS flag, as found in PET sidecars
#: (CONVENTIONS.md section 1).
FLAG_VARIANT = "NonLinearGradientCorrection"


@dataclass(frozen=True)
class ImageMetadata:
    """Scanner identity, patient placement and scanner-side correction state.

    Attributes
    ----------
    identity : dict
        Identity field -> value as a string (``software`` may join a list with
        ``"; "``); missing fields are absent.
    correction_flag : bool or str or None
        ``NonlinearGradientCorrection``: True, False, "2D", "3D" or None (absent).
    image_type : tuple of str
        ImageType tokens, upper case.
    table_position_mm : tuple of 3 float or None
    patient_position : str or None
    acquisition_type : str or None
        MRAcquisitionType ("2D" or "3D").
    ours : bool
        The sidecar carries our provenance key.
    """

    identity: dict[str, str]
    correction_flag: bool | str | None
    image_type: tuple[str, ...]
    table_position_mm: tuple[float, float, float] | None
    patient_position: str | None
    acquisition_type: str | None
    ours: bool


def correction_flag(value, src: str, key: str) -> bool | str | None:
    """Normalise a NonlinearGradientCorrection value: True, False, "2D", "3D" or None."""
    if value is None or isinstance(value, bool):
        return value
    if isinstance(value, str):
        text = value.strip().upper()
        if text in ("2D", "3D"):
            return text
        if text in ("TRUE", "FALSE"):
            return text == "TRUE"
    raise InputError(src, f"sidecar key {key}: expected true, false, \"2D\" or \"3D\", got {value!r}")


def _identity_value(value) -> str | None:
    if value is None:
        return None
    if isinstance(value, list):
        return "; ".join(str(v).strip() for v in value)
    return str(value).strip()


def _table_position(value, src: str, key: str) -> tuple[float, float, float] | None:
    if value is None:
        return None
    ok = (isinstance(value, list) and len(value) == 3
          and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value))
    if not ok:
        raise InputError(src, f"sidecar key {key}: expected three numbers (mm), got {value!r}")
    return tuple(float(v) for v in value)


def _image_type(value, src: str, key: str) -> tuple[str, ...]:
    if value is None:
        return ()
    if isinstance(value, str):
        value = value.replace("\\", " ").split()
    if not isinstance(value, list):
        raise InputError(src, f"sidecar key {key}: expected a list of strings, got {value!r}")
    return tuple(str(v).strip().upper() for v in value)


def read_metadata(metadata: Mapping, *, keys: Mapping[str, str] | None = None,
                  src: str = "sidecar") -> ImageMetadata:
    """Read the fields the correction needs from (inherited) sidecar metadata.

    Parameters
    ----------
    metadata : mapping
        Sidecar metadata, inheritance applied.
    keys : mapping, optional
        Our field name -> sidecar key (see ``METADATA_KEYS``).
    src : str
        Image path, for error messages.
    """
    keys = {**METADATA_KEYS, **(keys or {})}
    identity = {}
    for name in IDENTITY_FIELDS:
        value = _identity_value(metadata.get(keys[name]))
        if value:
            identity[name] = value
    flag_key = keys["correction_flag"]
    raw_flag = metadata.get(flag_key, metadata.get(FLAG_VARIANT))
    position = metadata.get(keys["patient_position"])
    acq = metadata.get(keys["acquisition_type"])
    return ImageMetadata(
        identity=identity,
        correction_flag=correction_flag(raw_flag, src, flag_key),
        image_type=_image_type(metadata.get(keys["image_type"]), src, keys["image_type"]),
        table_position_mm=_table_position(metadata.get(keys["table_position"]), src,
                                          keys["table_position"]),
        patient_position=str(position).strip().upper() if position else None,
        acquisition_type=str(acq).strip().upper() if acq else None,
        ours=PROVENANCE_KEY in metadata,
    )
