"""Per-image decisions: correct fully, correct the through-plane residual, or skip.

=====================================  ==========================================
scanner state (flag, ImageType tokens)  decision
=====================================  ==========================================
not corrected                          ``full``: the whole displacement
corrected in-plane only (2D)           ``throughplane``: the residual normal to
                                       the slices
corrected in 3D                        ``skip`` (the warp can still be emitted)
unknown (no flag, no token)            the site policy: correct, skip or error
one of our own outputs                 refused (never correct twice)
=====================================  ==========================================
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..frames import PATIENT_POSITIONS, DeviceFrame
from .metadata import PROVENANCE_KEY, ImageMetadata, read_metadata
from .siteconfig import Policy, ScannerRule, SiteConfig

__all__ = ["ACTIONS", "Decision", "decide", "match_scanner", "scanner_state"]

#: Decisions; the first two are also the correction mode passed to the warp.
ACTIONS = ("full", "throughplane", "skip")


@dataclass(frozen=True)
class Decision:
    """What to do with one image, and why.

    ``coil_path`` is for running only; :meth:`as_record` (what provenance and
    the decision table keep) names the coil model, never its path.
    """

    action: str
    reason: str
    rule: str
    site: str
    coil_model: str
    coil_path: str
    position: str
    table_position_mm: tuple[float, float, float] | None = None
    isocenter_offset_mm: tuple[float, float, float] | None = None
    warnings: tuple[str, ...] = ()

    @property
    def mode(self) -> str:
        """Warp mode: the action, or ``full`` for a skipped image whose warp is asked for."""
        return "throughplane" if self.action == "throughplane" else "full"

    def as_record(self) -> dict:
        """JSON-ready decision without the coil model's path."""
        record = asdict(self)
        record.pop("coil_path")
        record["warnings"] = list(self.warnings)
        return record


def _matches(rule: ScannerRule, identity: Mapping[str, str]) -> bool:
    for key, wanted in rule.match.items():
        have = identity.get(key)
        if have is None:
            return False
        # SoftwareVersions may be a list (joined with "; "): any one element matches.
        options = {have.casefold(), *(part.strip().casefold() for part in have.split(";"))}
        if wanted.strip().casefold() not in options:
            return False
    return True


def match_scanner(identity: Mapping[str, str], config: SiteConfig, src: str) -> ScannerRule:
    """The most specific scanner rule matching an identity.

    Raises
    ------
    InputError
        No rule matches (unknown scanner), or two rules match equally.
    """
    found = [r for r in config.scanners if _matches(r, identity)]
    if not found:
        shown = ", ".join(f"{k}={v!r}" for k, v in identity.items()) or "no identity fields at all"
        raise InputError(src, f"unknown scanner ({shown}): no rule of {config.source} matches; add a "
                              "rule under 'scanners' or give a coil model override")
    best = max(r.specificity for r in found)
    top = [r for r in found if r.specificity == best]
    if len(top) > 1:
        raise InputError(src, f"scanner rules {top[0].name!r} and {top[1].name!r} of {config.source} "
                              f"match equally ({best} fields each); make one of them more specific")
    return top[0]


def _token_state(meta: ImageMetadata, policy: Policy) -> str | None:
    tokens = set(meta.image_type)
    if tokens & {t.upper() for t in policy.corrected_3d_tokens}:
        return "3D"
    if tokens & {t.upper() for t in policy.corrected_2d_tokens}:
        return "2D"
    if tokens & {t.upper() for t in policy.uncorrected_tokens}:
        return "none"
    return None


def scanner_state(meta: ImageMetadata, policy: Policy, src: str) -> tuple[str, str]:
    """What the scanner did: ``"none"``, ``"2D"``, ``"3D"`` or ``"unknown"``, and why."""
    token = _token_state(meta, policy)
    flag = meta.correction_flag
    flag_state = {False: "none", "2D": "2D", "3D": "3D"}.get(flag)
    if flag is True:
        flag_state = token if token in ("2D", "3D") else policy.flag_true_means
    if token and flag_state and token != flag_state:
        raise InputError(src, f"sidecar contradicts itself: ImageType says {token!r} but "
                              f"NonlinearGradientCorrection is {flag!r}; fix the sidecar")
    if flag_state:
        why = f"NonlinearGradientCorrection={flag!r}"
        return flag_state, why + (" with ImageType token" if token else "")
    if token:
        return token, "ImageType token of the site policy"
    return "unknown", "no NonlinearGradientCorrection flag and no ImageType token"


def _action(state: str, why: str, policy: Policy, src: str) -> tuple[str, str]:
    if state == "unknown":
        if policy.flag_absent == "error":
            raise InputError(src, f"{why}; the site policy (flag_absent) makes this an error: add the "
                                  "flag to the sidecar or change the policy")
        action = "full" if policy.flag_absent == "correct" else "skip"
        return action, f"{why}; site policy: {policy.flag_absent}"
    text = {"none": "not corrected by the scanner", "2D": "corrected in-plane (2D) by the scanner",
            "3D": "corrected in 3D by the scanner"}[state]
    return {"none": "full", "2D": "throughplane", "3D": "skip"}[state], f"{text} ({why})"


def _geometry_warnings(affine: np.ndarray, position: str, policy: Policy) -> list[str]:
    from ..warp import default_slice_axis, slice_normal_ras

    axis = default_slice_axis(affine)
    thickness = float(np.linalg.norm(affine[:3, axis]))
    out = []
    if thickness > policy.thick_slice_mm:
        out.append(f"2D slices {thickness:.1f} mm thick (> {policy.thick_slice_mm:g} mm): "
                   "through-plane correction is approximate")
    normal_device = DeviceFrame(position).device_from_ras @ slice_normal_ras(affine, axis)
    tilt = float(np.degrees(np.arccos(min(1.0, np.max(np.abs(normal_device))))))
    if tilt > policy.oblique_tolerance_deg:
        out.append(f"2D slices oblique by {tilt:.1f} deg to the gradient axes: through-plane "
                   "correction is approximate")
    return out


def _coil(config: SiteConfig, rule: ScannerRule, src: str) -> Path:
    entry = config.coil_models[rule.coil_model]
    if entry.problem:
        raise InputError(config.source, entry.problem)
    if not entry.path.is_file():
        raise InputError(config.source, f"coil model {rule.coil_model!r} (for scanner rule "
                                        f"{rule.name!r}): file not found; check its path")
    if entry.sha256:
        from ..io.coilfile import coil_sha256

        if coil_sha256(entry.path) != entry.sha256:
            raise InputError(config.source, f"coil model {rule.coil_model!r}: the file's SHA-256 "
                                            "differs from the pinned 'sha256'; wrong file bound?")
    return entry.path


def _placement(meta: ImageMetadata, policy: Policy, keys: Mapping[str, str], src: str,
               warnings: list[str]) -> str:
    position = meta.patient_position
    if position is None:
        if policy.default_patient_position is None:
            raise InputError(src, f"sidecar key {keys['patient_position']} missing and the site "
                                  "policy has no default_patient_position")
        position = policy.default_patient_position
        warnings.append(f"{keys['patient_position']} missing: assuming {position}")
    if position not in PATIENT_POSITIONS:
        raise InputError(src, f"sidecar key {keys['patient_position']}: unknown position {position!r}")
    return position


def decide(metadata: Mapping, config: SiteConfig, *, src: str, affine: np.ndarray | None = None,
           coil_override: str | Path | None = None,
           isocenter_offset_mm: tuple[float, float, float] | None = None) -> Decision:
    """Decide what to do with one image.

    Parameters
    ----------
    metadata : mapping
        The image's sidecar metadata, BIDS inheritance applied.
    config : SiteConfig
    src : str
        The image's path (for messages).
    affine : (4, 4) ndarray, optional
        The image's voxel -> RAS mm affine, for the thick/oblique 2D warnings.
    coil_override : path, optional
        Use this coil model for every image; an unknown scanner then gets the
        default policy.
    isocenter_offset_mm : 3 floats, optional
        Device coordinates of the world origin, overriding TablePosition.

    Raises
    ------
    InputError
        Our own output, unknown scanner, tied rules, contradictory sidecar,
        or a missing field that the site policy makes an error.
    """
    if PROVENANCE_KEY in metadata:
        raise InputError(src, f"sidecar carries {PROVENANCE_KEY}: this is an nl_unwarp output; "
                              "refusing to correct it a second time")
    meta = read_metadata(metadata, keys=config.metadata_keys, src=src)
    keys = config.metadata_keys
    if coil_override is not None:
        try:
            rule = match_scanner(meta.identity, config, src)
        except InputError:
            rule = ScannerRule("coil model override", "", "override")
        coil_name, coil_path = "override", Path(coil_override)
    else:
        rule = match_scanner(meta.identity, config, src)
        coil_name, coil_path = rule.coil_model, _coil(config, rule, src)
    policy = config.policy_for(rule.site)
    state, why = scanner_state(meta, policy, src)
    action, reason = _action(state, why, policy, src)
    warnings: list[str] = []
    position = _placement(meta, policy, keys, src, warnings)
    table = meta.table_position_mm
    if table is None and isocenter_offset_mm is None:
        if policy.missing_table_position == "error":
            raise InputError(src, f"sidecar key {keys['table_position']} missing and the site policy "
                                  "(missing_table_position) makes this an error; give an isocenter offset")
        warnings.append(f"{keys['table_position']} missing: assuming the world origin is the isocenter")
    if affine is not None and meta.acquisition_type == "2D" and action != "skip":
        warnings.extend(_geometry_warnings(np.asarray(affine, float), position, policy))
    return Decision(action, reason, rule.name, rule.site, coil_name, str(coil_path), position, table,
                    tuple(isocenter_offset_mm) if isocenter_offset_mm is not None else None,
                    tuple(warnings))


def decide_file(image: str | Path, metadata: Mapping, *, site_config: str | Path | None = None,
                coil_override: str | Path | None = None,
                isocenter_offset_mm: tuple[float, float, float] | None = None) -> Decision:
    """:func:`decide` for an image file and a site configuration file.

    Without a site configuration, ``coil_override`` is required and the default
    policy applies.
    """
    import nibabel as nib

    from .siteconfig import load_site_config

    if site_config is None and coil_override is None:
        raise InputError(str(image), "give a site configuration or a coil model override")
    config = load_site_config(site_config) if site_config is not None else SiteConfig.empty()
    return decide(metadata, config, src=str(image), affine=nib.load(str(image)).affine,
                  coil_override=coil_override, isocenter_offset_mm=isocenter_offset_mm)
