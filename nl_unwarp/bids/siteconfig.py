"""Site configuration: which coil model each scanner has, and each site's policy.

The format (``nl_unwarp-site``, version 1) is specified in ``docs/site-config.md``.
A configuration holds

* ``coil_models``: named coil model files, kept outside the dataset (coefficient
  files are usually confidential). Paths may use ``${VARIABLE}`` from the
  environment and are relative to the configuration file otherwise; an optional
  ``sha256`` pins the expected file;
* ``scanners``: rules that match a scanner identity (any of manufacturer, model,
  gradient set, serial, station, software version) to a coil model and a site;
  the most specific matching rule wins, and a tie is an error;
* ``policy`` (defaults) and ``sites.<name>.policy`` (overrides);
* ``metadata_keys``: sidecar key names for the fields BIDS does not define.

The loader is strict: each problem raises :class:`~nl_unwarp.errors.InputError`
naming the file and the key.
"""

from __future__ import annotations

import json
import os
import re
from dataclasses import dataclass, field, replace
from pathlib import Path

from ..errors import InputError

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "IDENTITY_FIELDS",
    "METADATA_KEYS",
    "CoilEntry",
    "Policy",
    "ScannerRule",
    "SiteConfig",
    "load_site_config",
]

FORMAT_NAME = "nl_unwarp-site"
FORMAT_VERSION = 1

#: Scanner identity fields a rule may match, and the sidecar key each is read
#: from by default (BIDS names, BIDS specification "MRI: scanner hardware").
IDENTITY_FIELDS = {
    "manufacturer": "Manufacturer",
    "model": "ManufacturersModelName",
    "gradient_set": "GradientSetType",
    "serial": "DeviceSerialNumber",
    "station": "StationName",
    "software": "SoftwareVersions",
}
#: Every sidecar field read, by our name -> default sidecar key. All may be
#: renamed in ``metadata_keys`` (the non-BIDS ones, PatientPosition, are the
#: usual reason).
METADATA_KEYS = {
    **IDENTITY_FIELDS,
    "table_position": "TablePosition",
    "patient_position": "PatientPosition",
    "image_type": "ImageType",
    "acquisition_type": "MRAcquisitionType",
    "correction_flag": "NonlinearGradientCorrection",
}

_TOP_KEYS = {"format", "format_version", "description", "metadata_keys", "coil_models", "policy",
             "sites", "scanners"}
_FLAG_ABSENT = ("correct", "skip", "error")
_TABLE_MISSING = ("error", "warn")
_FLAG_TRUE = ("3D", "2D")
_VAR = re.compile(r"\$\{([A-Za-z_][A-Za-z0-9_]*)\}")


@dataclass(frozen=True)
class Policy:
    """What a site's images mean and what to do when metadata is missing.

    Attributes
    ----------
    corrected_2d_tokens, corrected_3d_tokens : tuple of str
        ImageType tokens meaning the scanner corrected in 2D (in-plane) or 3D.
    uncorrected_tokens : tuple of str
        ImageType tokens meaning the scanner did not correct.
    flag_true_means : {"3D", "2D"}
        How to read ``NonlinearGradientCorrection: true`` when no token says more.
    flag_absent : {"correct", "skip", "error"}
        What to do when neither the flag nor a token says.
    missing_table_position : {"error", "warn"}
        ``warn``: assume the world origin is the isocenter, and warn.
    default_patient_position : str or None
        Used (with a warning) when PatientPosition is missing; None: an error.
    thick_slice_mm : float
        2D slices thicker than this get a warning when corrected through-plane.
    oblique_tolerance_deg : float
        2D slices tilted further than this from a device axis get a warning.
    """

    corrected_2d_tokens: tuple[str, ...] = ()
    corrected_3d_tokens: tuple[str, ...] = ()
    uncorrected_tokens: tuple[str, ...] = ()
    flag_true_means: str = "3D"
    flag_absent: str = "error"
    missing_table_position: str = "warn"
    default_patient_position: str | None = "HFS"
    thick_slice_mm: float = 4.0
    oblique_tolerance_deg: float = 1.0


@dataclass(frozen=True)
class CoilEntry:
    """A named coil model file (resolved path) and its optional pinned SHA-256."""

    name: str
    path: Path | None
    sha256: str | None = None
    #: Why the path could not be resolved (an unset variable), reported when used.
    problem: str | None = None


@dataclass(frozen=True)
class ScannerRule:
    """Match scanner identity fields to a coil model and a site."""

    name: str
    site: str
    coil_model: str
    match: dict[str, str] = field(default_factory=dict)

    @property
    def specificity(self) -> int:
        """Number of identity fields the rule pins."""
        return len(self.match)


@dataclass(frozen=True)
class SiteConfig:
    """A loaded site configuration (see the module docstring)."""

    source: str
    coil_models: dict[str, CoilEntry]
    scanners: tuple[ScannerRule, ...]
    policies: dict[str, Policy]
    default_policy: Policy
    metadata_keys: dict[str, str]

    def policy_for(self, site: str | None) -> Policy:
        """The policy of a site (the defaults for an unknown or absent site)."""
        return self.policies.get(site, self.default_policy) if site else self.default_policy

    @classmethod
    def empty(cls) -> SiteConfig:
        """No rules, default policy: for a run with a coil model override only."""
        return cls("(no site configuration)", {}, (), {}, Policy(), dict(METADATA_KEYS))


def _fail(src: str, message: str):
    raise InputError(src, message)


def _expand(raw: str, src: str, where: str) -> tuple[str | None, str | None]:
    missing = [m.group(1) for m in _VAR.finditer(raw) if m.group(1) not in os.environ]
    if missing:
        return None, (f"{where}: environment variable {missing[0]} is not set (it should hold "
                      "the folder of the coil model files)")
    return _VAR.sub(lambda m: os.environ[m.group(1)], raw), None


def _coil_entries(doc, src: str, base: Path) -> dict[str, CoilEntry]:
    if not isinstance(doc, dict) or not doc:
        _fail(src, "key 'coil_models' must be a non-empty object of name -> {path, sha256}")
    out = {}
    for name, entry in doc.items():
        where = f"coil_models.{name}"
        if not isinstance(entry, dict) or not isinstance(entry.get("path"), str):
            _fail(src, f"key '{where}.path' missing or not a string")
        unknown = sorted(set(entry) - {"path", "sha256", "description"})
        if unknown:
            _fail(src, f"unknown key '{where}.{unknown[0]}' (allowed: path, sha256, description)")
        sha = entry.get("sha256")
        if sha is not None and not (isinstance(sha, str) and re.fullmatch(r"[0-9a-f]{64}", sha)):
            _fail(src, f"key '{where}.sha256' must be 64 lower-case hexadecimal digits")
        expanded, problem = _expand(entry["path"], src, f"key '{where}.path'")
        path = None
        if expanded is not None:
            path = Path(expanded).expanduser()
            path = path if path.is_absolute() else (base / path)
        out[name] = CoilEntry(name, path, sha, problem)
    return out


def _str_tuple(value, src: str, where: str) -> tuple[str, ...]:
    if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
        _fail(src, f"key '{where}' must be a list of non-empty strings")
    return tuple(value)


def _policy(doc, base: Policy, src: str, where: str) -> Policy:
    if not isinstance(doc, dict):
        _fail(src, f"key '{where}' must be an object")
    changes = {}
    for key, value in doc.items():
        name = f"{where}.{key}"
        if key in ("corrected_2d_tokens", "corrected_3d_tokens", "uncorrected_tokens"):
            changes[key] = _str_tuple(value, src, name)
        elif key in ("flag_true_means", "flag_absent", "missing_table_position"):
            allowed = {"flag_true_means": _FLAG_TRUE, "flag_absent": _FLAG_ABSENT,
                       "missing_table_position": _TABLE_MISSING}[key]
            if value not in allowed:
                _fail(src, f"key '{name}' must be one of {', '.join(allowed)}, got {value!r}")
            changes[key] = value
        elif key == "default_patient_position":
            from ..frames import PATIENT_POSITIONS

            if value is not None and value not in PATIENT_POSITIONS:
                _fail(src, f"key '{name}' must be null or one of {', '.join(PATIENT_POSITIONS)}")
            changes[key] = value
        elif key in ("thick_slice_mm", "oblique_tolerance_deg"):
            if isinstance(value, bool) or not isinstance(value, (int, float)) or value <= 0:
                _fail(src, f"key '{name}' must be a positive number")
            changes[key] = float(value)
        else:
            _fail(src, f"unknown key '{name}'")
    return replace(base, **changes)


def _rules(doc, src: str, coils: dict, sites: dict) -> tuple[ScannerRule, ...]:
    if not isinstance(doc, list):
        _fail(src, "key 'scanners' must be a list of rules")
    rules, names = [], set()
    for i, entry in enumerate(doc):
        where = f"scanners[{i}]"
        if not isinstance(entry, dict):
            _fail(src, f"key '{where}' must be an object")
        unknown = sorted(set(entry) - {"name", "site", "coil_model", "match"})
        if unknown:
            _fail(src, f"unknown key '{where}.{unknown[0]}' (allowed: name, site, coil_model, match)")
        name = entry.get("name", f"rule {i}")
        if name in names:
            _fail(src, f"key '{where}.name': rule name {name!r} used twice")
        names.add(name)
        if entry.get("coil_model") not in coils:
            _fail(src, f"key '{where}.coil_model': {entry.get('coil_model')!r} is not under coil_models")
        site = entry.get("site")
        if site is not None and site not in sites:
            _fail(src, f"key '{where}.site': {site!r} is not under sites")
        match = entry.get("match")
        if not isinstance(match, dict) or not match:
            _fail(src, f"key '{where}.match' must be a non-empty object")
        for key, value in match.items():
            if key not in IDENTITY_FIELDS:
                _fail(src, f"key '{where}.match.{key}': not an identity field "
                           f"({', '.join(IDENTITY_FIELDS)})")
            if not isinstance(value, str) or not value.strip():
                _fail(src, f"key '{where}.match.{key}' must be a non-empty string")
        rules.append(ScannerRule(name, site or "", entry["coil_model"], dict(match)))
    return tuple(rules)


def _metadata_keys(doc, src: str) -> dict[str, str]:
    keys = dict(METADATA_KEYS)
    if doc is None:
        return keys
    if not isinstance(doc, dict):
        _fail(src, "key 'metadata_keys' must be an object")
    for key, value in doc.items():
        if key not in METADATA_KEYS:
            _fail(src, f"key 'metadata_keys.{key}': unknown field ({', '.join(METADATA_KEYS)})")
        if not isinstance(value, str) or not value:
            _fail(src, f"key 'metadata_keys.{key}' must be a sidecar key name")
        keys[key] = value
    return keys


def load_site_config(path: str | Path) -> SiteConfig:
    """Load and validate a site configuration file.

    Raises
    ------
    InputError
        Naming the file and the key of the first problem found. Coil model
        paths that cannot be resolved (an unset environment variable) are
        reported only when a rule that needs them matches an image.
    """
    path = Path(path)
    src = str(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(src, "site configuration file not found") from None
    except (ValueError, UnicodeDecodeError) as exc:
        raise InputError(src, f"not valid JSON ({exc})") from None
    if not isinstance(doc, dict):
        _fail(src, "top level must be a JSON object")
    unknown = sorted(set(doc) - _TOP_KEYS)
    if unknown:
        _fail(src, f"unknown key '{unknown[0]}' (allowed: {', '.join(sorted(_TOP_KEYS))})")
    if doc.get("format") != FORMAT_NAME:
        _fail(src, f"key 'format' must be {FORMAT_NAME!r}, got {doc.get('format')!r}")
    if doc.get("format_version") != FORMAT_VERSION:
        _fail(src, f"key 'format_version': this version reads {FORMAT_VERSION}, "
                   f"got {doc.get('format_version')!r}")
    coils = _coil_entries(doc.get("coil_models"), src, path.resolve().parent)
    default = _policy(doc.get("policy", {}), Policy(), src, "policy")
    sites_doc = doc.get("sites", {})
    if not isinstance(sites_doc, dict):
        _fail(src, "key 'sites' must be an object of site name -> {policy}")
    policies = {}
    for name, site in sites_doc.items():
        if not isinstance(site, dict) or sorted(set(site) - {"policy", "description"}):
            _fail(src, f"key 'sites.{name}' must be an object with 'policy' (and 'description')")
        policies[name] = _policy(site.get("policy", {}), default, src, f"sites.{name}.policy")
    rules = _rules(doc.get("scanners", []), src, coils, policies)
    return SiteConfig(src, coils, rules, policies, default, _metadata_keys(doc.get("metadata_keys"), src))
