"""Transform files: every format conversion of a pull map, in one module.

Inside the project a transform is a *pull* map in world RAS+ mm (see
:mod:`nl_unwarp.compose`): :class:`~nl_unwarp.compose.AffineStep` or
:class:`~nl_unwarp.compose.FieldStep`, and a chain is a list of them in
application order (first item applied first to a point of the output grid,
as antspyx ``transformlist`` and nitransforms ``TransformChain``).

Formats and their conventions:

* **ITK affine** text (``.txt``/``.tfm``) and MATLAB v4 (``.mat``): an
  ``AffineTransform_double_3_3`` with parameters ``m11 .. m33 t1 t2 t3`` and
  fixed parameters (the centre ``c``), mapping LPS points ``y = M (x - c) + c + t``
  from the fixed (output) to the moving (input) space. The ``.mat`` file holds
  two double column vectors named after the transform type and ``fixed``
  (checked against files SimpleITK writes, in the tests). Read too, through
  their parameters: ``TranslationTransform`` (t), ``Euler3DTransform`` (three
  angles, t; fixed: c and the ComputeZYX flag), ``VersorRigid3DTransform``
  (versor, t), ``Similarity3DTransform`` (versor, t, scale), ``ScaleTransform``
  (scales; fixed: c), ``ScaleVersor3DTransform`` and ``ScaleSkewVersor3DTransform``
  (versor, t, scales, skews), and text files holding a ``CompositeTransform`` of
  them (members in ITK order).
* **ITK displacement field** in NIfTI: :mod:`nl_unwarp.io.itk` (re-exported).
* **ITK composite** ``.h5`` (HDF5): ``/TransformGroup/0`` is the
  ``CompositeTransform_double_3_3``, members follow as ``/TransformGroup/1..``
  in ITK list order (the *last* is applied first), each with
  ``TransformType``, ``TransformParameters``, ``TransformFixedParameters``.
  A displacement field's fixed parameters are size (3), origin (3), spacing
  (3) and direction (9, row-major), in LPS; its parameters are the LPS
  vectors, x fastest, components interleaved (the layout ITK 5.4 writes,
  read back with SimpleITK and antspyx in the tests).
* **X5** (HDF5) through nitransforms: RAS displacements and matrices, chain
  in nitransforms order.
* **FSL-style warp** (relative, mm): a 4-D (X, Y, Z, 3) NIfTI on the
  reference grid holding displacements along FSL's scaled-voxel axes: the
  voxel axes scaled by the voxel sizes, with the first axis reversed when the
  affine's determinant is positive (FSL documentation of its coordinate
  system, from memory). See :func:`write_fsl_warp`.
"""

from __future__ import annotations

import contextlib
import warnings
from collections.abc import Sequence
from pathlib import Path

import nibabel as nib
import numpy as np

from ..compose import AffineStep, FieldStep
from ..errors import InputError
from ..frames import LPS_FROM_RAS
from .atomic import OutputSet, full_suffix
from .itk import read_itk_field, write_itk_field
from .nifti import write_image

__all__ = [
    "AFFINE_SUFFIXES",
    "FIELD_SUFFIXES",
    "affine_lps_to_ras",
    "affine_ras_to_lps",
    "fsl_axes",
    "load_chain",
    "read_fsl_warp",
    "read_itk_affine",
    "read_itk_composite",
    "read_itk_field",
    "read_itk_text_chain",
    "read_x5",
    "save_chain",
    "write_fsl_warp",
    "write_itk_affine",
    "write_itk_composite",
    "write_itk_field",
    "write_x5",
]

AFFINE_SUFFIXES = (".txt", ".tfm", ".mat")
FIELD_SUFFIXES = (".nii", ".nii.gz")
#: LPS <-> RAS on homogeneous coordinates (DICOM PS3.3 C.7.6.2.1.1 vs NIfTI-1).
_FLIP4 = np.diag([-1.0, -1.0, 1.0, 1.0])
_ITK_AFFINE_TYPE = "AffineTransform_double_3_3"
_ITK_FIELD_TYPE = "DisplacementFieldTransform_double_3_3"
_ITK_COMPOSITE_TYPE = "CompositeTransform_double_3_3"
#: Orthonormality allowed in a grid's direction cosines (ITK needs them without shear).
_DIRECTION_TOL = 1e-5


def affine_lps_to_ras(matrix_lps: np.ndarray) -> np.ndarray:
    """An LPS pull map (ITK) as an RAS pull map: ``F M F`` with ``F = diag(-1, -1, 1, 1)``."""
    return _FLIP4 @ np.asarray(matrix_lps, float) @ _FLIP4


def affine_ras_to_lps(matrix_ras: np.ndarray) -> np.ndarray:
    """An RAS pull map as an LPS pull map (the conversion is its own inverse)."""
    return affine_lps_to_ras(matrix_ras)


def _itk_params_to_lps(params: np.ndarray, fixed: np.ndarray, src: str) -> np.ndarray:
    """ITK (M, t; centre c) -> 4 x 4 LPS matrix ``[M, t + c - M c]``."""
    if params.size != 12:
        raise InputError(src, f"transform parameters: expected 12 values (3 x 3 matrix and "
                              f"translation), got {params.size}")
    return _centred(params[:9].reshape(3, 3), params[9:12], fixed)


def _centred(matrix: np.ndarray, translation: np.ndarray, fixed: np.ndarray) -> np.ndarray:
    """ITK's MatrixOffsetTransformBase map ``y = M (x - c) + c + t`` (c: the first three
    fixed parameters, zero if absent) as a 4 x 4 LPS matrix."""
    centre = fixed[:3] if fixed.size >= 3 else np.zeros(3)
    out = np.eye(4)
    out[:3, :3] = matrix
    out[:3, 3] = translation + centre - matrix @ centre
    return out


def _versor_matrix(versor: np.ndarray, src: str) -> np.ndarray:
    """Rotation of a versor (the vector part of a unit quaternion, w = sqrt(1 - |v|^2) >= 0),
    the standard quaternion rotation (ITK's itk::Versor)."""
    x, y, z = versor
    norm2 = x * x + y * y + z * z
    if norm2 > 1.0 + 1e-9:
        raise InputError(src, f"versor parameters {versor.tolist()}: norm {np.sqrt(norm2):.6f} > 1")
    w = np.sqrt(max(0.0, 1.0 - norm2))
    return np.array([[1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)],
                     [2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)],
                     [2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)]])


def _euler_matrix(angles: np.ndarray, zyx: bool) -> np.ndarray:
    """ITK's Euler3DTransform rotation, radians: ``Rz Rx Ry`` (default), ``Rz Ry Rx`` when the
    fourth fixed parameter (ComputeZYX) is set (recalled, and checked against SimpleITK in the tests)."""
    cx, cy, cz = np.cos(angles)
    sx, sy, sz = np.sin(angles)
    rx = np.array([[1, 0, 0], [0, cx, -sx], [0, sx, cx]])
    ry = np.array([[cy, 0, sy], [0, 1, 0], [-sy, 0, cy]])
    rz = np.array([[cz, -sz, 0], [sz, cz, 0], [0, 0, 1]])
    return rz @ ry @ rx if zyx else rz @ rx @ ry


#: Linear 3-D ITK transforms read through their parameters: name -> number of parameters.
_LINEAR_TYPES = {"AffineTransform": 12, "MatrixOffsetTransformBase": 12, "TranslationTransform": 3,
                 "Euler3DTransform": 6, "VersorRigid3DTransform": 6, "Similarity3DTransform": 7,
                 "ScaleTransform": 3, "ScaleVersor3DTransform": 9, "ScaleSkewVersor3DTransform": 15}


def _scale_skew_versor_matrix(params: np.ndarray, src: str) -> np.ndarray:
    """Matrix of ITK's ScaleVersor3D (9 parameters) and ScaleSkewVersor3D (15) transforms.

    Versor ``v``, translation, scales ``s`` (3), then skews ``k`` (6, ScaleSkew only). The
    scales and skews are *added* to the rotation's entries, not multiplied:
    ``M = R(v) + diag(s - 1) + K`` with ``K[0, 1], K[0, 2], K[1, 0], K[1, 2], K[2, 0], K[2, 1]
    = k``. Found by experiment with SimpleITK 2.5 (its ``GetMatrix`` for single and combined
    parameters), not from ITK's source; ``tests/test_transforms.py`` checks it against SimpleITK.
    """
    matrix = _versor_matrix(params[:3], src) + np.diag(params[6:9] - 1.0)
    if params.size == 15:
        matrix[[0, 0, 1, 1, 2, 2], [1, 2, 0, 2, 0, 1]] += params[9:15]
    return matrix


def _linear_type(kind: str) -> str | None:
    """The base name of a supported linear 3-D transform type (``Name_double_3_3``), else None."""
    base = kind.split("_")[0]
    return base if base in _LINEAR_TYPES and kind.endswith("_3_3") else None


def _linear_lps(kind: str, params: np.ndarray, fixed: np.ndarray, src: str) -> np.ndarray:
    """A linear ITK transform (type name, parameters, fixed parameters) as a 4 x 4 LPS pull matrix."""
    base = _linear_type(kind)
    if base is None:
        raise InputError(src, f"transform type {kind!r} is not supported (3-D affine, translation, "
                              "Euler, versor-rigid, similarity, scale, scale-versor, scale-skew-versor, "
                              "or a displacement field)")
    if params.size != _LINEAR_TYPES[base]:
        raise InputError(src, f"{kind} parameters: expected {_LINEAR_TYPES[base]} values, got {params.size}")
    if base in ("AffineTransform", "MatrixOffsetTransformBase"):
        return _itk_params_to_lps(params, fixed, src)
    if base == "TranslationTransform":
        return _centred(np.eye(3), params, np.zeros(0))
    if base == "ScaleTransform":
        return _centred(np.diag(params), np.zeros(3), fixed)
    if base in ("ScaleVersor3DTransform", "ScaleSkewVersor3DTransform"):
        return _centred(_scale_skew_versor_matrix(params, src), params[3:6], fixed)
    if base == "Euler3DTransform":
        zyx = fixed.size >= 4 and bool(fixed[3])
        return _centred(_euler_matrix(params[:3], zyx), params[3:6], fixed)
    scale = params[6] if base == "Similarity3DTransform" else 1.0
    return _centred(scale * _versor_matrix(params[:3], src), params[3:6], fixed)


def _parse_itk_text(text: str, src: str) -> list[tuple[str, np.ndarray, np.ndarray]]:
    """(type, parameters, fixed parameters) of each transform of an ITK text file."""
    if not text.lstrip().startswith("#Insight Transform File"):
        raise InputError(src, "not an ITK transform text file (no '#Insight Transform File' line)")
    items = []
    for line in text.splitlines():
        key, _, value = line.partition(":")
        key = key.strip()
        if key == "Transform":
            items.append([value.strip(), np.zeros(0), np.zeros(0)])
        elif key in ("Parameters", "FixedParameters") and items:
            nums = np.array([float(v) for v in value.split()], dtype=float)
            items[-1][1 if key == "Parameters" else 2] = nums
    return [tuple(i) for i in items]


def _read_mat_v4(path: Path) -> tuple[str, np.ndarray, np.ndarray]:
    from scipy.io import loadmat

    try:
        mat = loadmat(str(path))
    except (ValueError, OSError, TypeError) as exc:
        raise InputError(str(path), f"unreadable MATLAB transform file ({exc})") from None
    names = [k for k in mat if not k.startswith("__") and k != "fixed"]
    if len(names) != 1 or "fixed" not in mat:
        raise InputError(str(path), f"variables {sorted(k for k in mat if not k.startswith('__'))}: "
                                    "expected one transform and 'fixed'")
    return names[0], np.ravel(mat[names[0]]).astype(float), np.ravel(mat["fixed"]).astype(float)


def _read_itk_linear_file(path: Path) -> list[tuple[str, np.ndarray, np.ndarray]]:
    """(type, parameters, fixed) of the transforms of an ITK text or MATLAB file, in
    application order (first applied first). A text file holds one transform or a
    ``CompositeTransform`` followed by its members in ITK order (the last applied
    first, as SimpleITK reads them); a list without that header is refused, since
    ITK does not define its order (SimpleITK reads only its first transform)."""
    src = str(path)
    if not path.exists():
        raise InputError(src, "transform file not found")
    if path.suffix.lower() == ".mat":
        return [_read_mat_v4(path)]
    items = _parse_itk_text(path.read_text(errors="replace"), src)
    if not items:
        raise InputError(src, "no transform in the file")
    if items[0][0].startswith("CompositeTransform"):
        return items[1:][::-1]
    if len(items) != 1:
        raise InputError(src, f"{len(items)} transforms without a CompositeTransform header: their order "
                              "is not defined; write them as an ITK composite")
    return items


def read_itk_affine(path: str | Path) -> np.ndarray:
    """Read an ITK linear transform (``.txt``, ``.tfm`` or ``.mat``) as an RAS pull matrix.

    Affine, translation, Euler 3-D, versor-rigid 3-D and similarity 3-D
    transforms are read through their parameters (each ``y = M (x - c) + c + t``
    in LPS about its centre ``c``); a composite of them gives their product.

    Returns
    -------
    (4, 4) ndarray
        Output-side (fixed) RAS point -> input-side (moving) RAS point.
    """
    path = Path(path)
    src = str(path)
    items = _read_itk_linear_file(path)
    matrix = np.eye(4)
    for kind, params, fixed in items:
        if kind.startswith("DisplacementFieldTransform"):
            raise InputError(src, f"transform type {kind!r}: a displacement field is not an affine")
        matrix = _linear_lps(kind, params, fixed, src) @ matrix
    return affine_lps_to_ras(matrix)


def read_itk_text_chain(path: str | Path) -> list[AffineStep]:
    """Read an ITK text/MATLAB transform file as a chain of affines (application order)."""
    path = Path(path)
    return [AffineStep(affine_lps_to_ras(_linear_lps(kind, params, fixed, str(path))))
            for kind, params, fixed in _read_itk_linear_file(path)]


def _lps_params(matrix_ras: np.ndarray) -> np.ndarray:
    lps = affine_ras_to_lps(matrix_ras)
    return np.concatenate([lps[:3, :3].ravel(), lps[:3, 3]])


def write_itk_affine(outputs: OutputSet, path: str | Path, matrix_ras: np.ndarray) -> Path:
    """Write an RAS pull matrix as an ITK affine file (text for ``.txt``/``.tfm``, v4 for ``.mat``).

    The centre (fixed parameters) is written as zero; the offset carries the translation.
    """
    path = Path(path)
    params = _lps_params(AffineStep(matrix_ras).matrix_ras)
    tmp = outputs.reserve(path)
    if path.suffix.lower() == ".mat":
        from scipy.io import savemat

        # MATLAB v4, two double column vectors: what ITK's MatlabTransformIO writes.
        savemat(str(tmp), {_ITK_AFFINE_TYPE: params[:, None], "fixed": np.zeros((3, 1))},
                format="4")
    elif path.suffix.lower() in (".txt", ".tfm"):
        tmp.write_text("#Insight Transform File V1.0\n#Transform 0\n"
                       f"Transform: {_ITK_AFFINE_TYPE}\n"
                       f"Parameters: {' '.join(repr(float(v)) for v in params)}\n"
                       "FixedParameters: 0 0 0\n")
    else:
        raise InputError(str(path), f"suffix {path.suffix!r}: an ITK affine is .txt, .tfm or .mat")
    return path


def _grid_lps(affine: np.ndarray, src: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Origin, spacing and direction (LPS) of a grid affine; refuses sheared grids."""
    lps = LPS_FROM_RAS @ np.asarray(affine, float)[:3]
    spacing = np.linalg.norm(lps[:, :3], axis=0)
    direction = lps[:, :3] / spacing
    if not np.allclose(direction.T @ direction, np.eye(3), atol=_DIRECTION_TOL):
        raise InputError(src, "grid affine has shear; ITK fields need orthogonal voxel axes")
    return lps[:, 3], spacing, direction


def _field_fixed_params(step: FieldStep, src: str) -> np.ndarray:
    origin, spacing, direction = _grid_lps(step.affine, src)
    return np.concatenate([np.array(step.shape, float), origin, spacing, direction.ravel()])


def _field_from_itk(params: np.ndarray, fixed: np.ndarray, src: str) -> FieldStep:
    if fixed.size != 18:
        raise InputError(src, f"displacement field fixed parameters: {fixed.size} values, expected 18")
    shape = tuple(int(round(v)) for v in fixed[:3])
    if params.size != 3 * int(np.prod(shape)):
        raise InputError(src, f"displacement field: {params.size} parameters for a {shape} grid")
    affine_lps = np.eye(4)
    affine_lps[:3, :3] = fixed[9:18].reshape(3, 3) * fixed[6:9]
    affine_lps[:3, 3] = fixed[3:6]
    # x fastest, components interleaved: (Z, Y, X, 3) in C order.
    disp_lps = params.reshape(shape[::-1] + (3,)).transpose(2, 1, 0, 3)
    disp_ras = disp_lps * np.diag(LPS_FROM_RAS)
    return FieldStep(disp_ras, _FLIP4 @ affine_lps)


def _h5_text(dataset) -> str:
    value = dataset[()]
    value = value[0] if np.ndim(value) else value
    return value.decode() if isinstance(value, bytes) else str(value)


def read_itk_composite(path: str | Path) -> list[AffineStep | FieldStep]:
    """Read an ITK composite ``.h5`` into a chain (application order: first applied first).

    Affine and displacement-field members are supported (any scalar type);
    the file's ITK order is reversed.
    """
    import h5py

    src = str(path)
    try:
        h5 = h5py.File(src, "r")
    except OSError as exc:
        raise InputError(src, f"not an HDF5 file ({exc})") from None
    with h5:
        if "TransformGroup" not in h5:
            raise InputError(src, "no /TransformGroup: not an ITK transform file")
        groups = sorted(h5["TransformGroup"].items(), key=lambda kv: int(kv[0]))
        steps = []
        for key, grp in groups:
            kind = _h5_text(grp["TransformType"])
            if kind.startswith("CompositeTransform"):
                continue
            # Old ITK wrote the misspelt "Tranform..." names.
            pre = "Transform" if "TransformParameters" in grp else "Tranform"
            params = np.asarray(grp[f"{pre}Parameters"][()], float).ravel()
            fixed = np.asarray(grp[f"{pre}FixedParameters"][()], float).ravel()
            where = f"{src}:/TransformGroup/{key}"
            if kind.startswith("DisplacementFieldTransform"):
                steps.append(_field_from_itk(params, fixed, where))
            else:
                steps.append(AffineStep(affine_lps_to_ras(_linear_lps(kind, params, fixed, where))))
    return steps[::-1]


def _h5_string(group, name: str, value: str) -> None:
    import h5py

    group.create_dataset(name, data=np.array([value.encode()], dtype=h5py.string_dtype("ascii")))


def write_itk_composite(outputs: OutputSet, path: str | Path,
                        chain: Sequence[AffineStep | FieldStep]) -> Path:
    """Write a chain (application order) as an ITK composite ``.h5``, un-folded.

    Members are written in ITK order (reversed), in double precision, LPS.
    """
    import h5py

    src = str(path)
    tmp = outputs.reserve(path)
    with h5py.File(str(tmp), "w") as h5:
        _h5_string(h5, "HDFVersion", f"HDF5 library version: {h5py.version.hdf5_version}")
        group = h5.create_group("TransformGroup")
        head = group.create_group("0")
        _h5_string(head, "TransformType", _ITK_COMPOSITE_TYPE)
        for n, step in enumerate(reversed(list(chain)), start=1):
            grp = group.create_group(str(n))
            if isinstance(step, AffineStep):
                _h5_string(grp, "TransformType", _ITK_AFFINE_TYPE)
                grp.create_dataset("TransformParameters", data=_lps_params(step.matrix_ras))
                grp.create_dataset("TransformFixedParameters", data=np.zeros(3))
            else:
                _h5_string(grp, "TransformType", _ITK_FIELD_TYPE)
                disp_lps = step.disp_ras_mm.astype(float) * np.diag(LPS_FROM_RAS)
                grp.create_dataset("TransformParameters",
                                   data=disp_lps.transpose(2, 1, 0, 3).ravel())
                grp.create_dataset("TransformFixedParameters", data=_field_fixed_params(step, src))
    return Path(path)


@contextlib.contextmanager
def _quiet_reference():
    """nitransforms warns when a chain starts with an affine without a reference
    grid; a pull map needs none (the target grid is the caller's), so that one
    warning is silenced."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Reference space not set", category=UserWarning)
        yield


def _nitransforms_of(step: AffineStep | FieldStep):
    from nitransforms.linear import Affine
    from nitransforms.nonlinear import DenseFieldTransform

    if isinstance(step, AffineStep):
        return Affine(step.matrix_ras)
    img = nib.Nifti1Image(step.disp_ras_mm, step.affine)
    return DenseFieldTransform(img)


def write_x5(outputs: OutputSet, path: str | Path, chain: Sequence[AffineStep | FieldStep]) -> Path:
    """Write a chain as X5 through nitransforms (``TransformChain``, nitransforms order = ours)."""
    from nitransforms.manip import TransformChain

    tmp = outputs.reserve(path)
    with _quiet_reference():
        TransformChain([_nitransforms_of(s) for s in chain]).to_filename(str(tmp), fmt="X5")
    return Path(path)


def read_x5(path: str | Path) -> list[AffineStep | FieldStep]:
    """Read the first chain of an X5 file through nitransforms."""
    from nitransforms.linear import Affine
    from nitransforms.manip import TransformChain
    from nitransforms.nonlinear import DenseFieldTransform

    src = str(path)
    try:
        with _quiet_reference():
            chain = TransformChain.from_filename(src, fmt="X5")
    except (OSError, TypeError, KeyError, ValueError) as exc:
        raise InputError(src, f"cannot read X5 chain ({exc})") from None
    steps = []
    for xfm in chain.transforms:
        if isinstance(xfm, Affine):
            steps.append(AffineStep(np.asarray(xfm.matrix, float)))
        elif isinstance(xfm, DenseFieldTransform) and xfm.is_deltas:
            steps.append(FieldStep(np.asarray(xfm._deltas, np.float32), xfm.reference.affine))
        else:
            raise InputError(src, f"X5 member {type(xfm).__name__} is not supported")
    return steps


def fsl_axes(affine: np.ndarray, shape: Sequence[int]) -> np.ndarray:
    """World RAS -> FSL scaled-voxel mm, as a (4, 4) matrix.

    FSL's coordinates of an image are its voxel indices times the voxel sizes,
    with the first index reversed (``i -> nx - 1 - i``) when the affine's
    determinant is positive (FSL's coordinate-system documentation, from memory;
    it is also what nitransforms' ``_fsl_aff_adapt`` does).
    """
    affine = np.asarray(affine, float)
    zooms = np.linalg.norm(affine[:3, :3], axis=0)
    swap = np.eye(4)
    if np.linalg.det(affine[:3, :3]) > 0:
        swap[0, 0] = -1.0
        swap[0, 3] = (shape[0] - 1) * zooms[0]
    return swap @ np.diag([*zooms, 1.0]) @ np.linalg.inv(affine)


def write_fsl_warp(outputs: OutputSet, path: str | Path, disp_ras_mm: np.ndarray,
                   affine: np.ndarray, *, source_shape: Sequence[int] | None = None,
                   source_affine: np.ndarray | None = None) -> Path:
    """Write a pull field as an FSL-style relative warp (mm, scaled-voxel axes).

    Parameters
    ----------
    disp_ras_mm : (X, Y, Z, 3) ndarray
        Displacement on the reference grid, RAS mm.
    affine : (4, 4) ndarray
        Reference grid affine (the warp's grid).
    source_shape, source_affine : optional
        The grid of the image the warp will be applied to; default: the
        reference grid itself (our correction field on the raw grid).

    Notes
    -----
    FSL maps reference scaled-voxel mm ``f_r`` to input scaled-voxel mm
    ``f_r + w(f_r)``; with :math:`S_r, S_s` the world -> scaled-voxel maps of
    the reference and source grids (:func:`fsl_axes`),

    .. math:: w(\\mathbf p) = S_s(\\mathbf p + \\mathbf d(\\mathbf p)) - S_r(\\mathbf p).
    """
    disp = np.asarray(disp_ras_mm, float)
    shape = disp.shape[:3]
    src_shape = shape if source_shape is None else tuple(source_shape)
    src_affine = affine if source_affine is None else source_affine
    s_ref, s_src = fsl_axes(affine, shape), fsl_axes(src_affine, src_shape)
    ijk = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij"), -1)
    world = ijk @ np.asarray(affine, float)[:3, :3].T + np.asarray(affine, float)[:3, 3]
    moved = world + disp
    warp = (moved @ s_src[:3, :3].T + s_src[:3, 3]) - (world @ s_ref[:3, :3].T + s_ref[:3, 3])
    return write_image(outputs, path, warp.astype(np.float32), affine)


def read_fsl_warp(path: str | Path, *, source_shape: Sequence[int] | None = None,
                  source_affine: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Read an FSL-style relative warp (mm) as an RAS pull field on its grid.

    The inverse of :func:`write_fsl_warp`; returns ``(disp_ras_mm, affine)``.
    """
    src = str(path)
    try:
        img = nib.load(src)
        warp = np.asarray(img.dataobj, dtype=float)
    except (FileNotFoundError, nib.filebasedimages.ImageFileError, OSError) as exc:
        raise InputError(src, f"cannot read FSL warp ({exc})") from None
    if warp.ndim != 4 or warp.shape[3] != 3:
        raise InputError(src, f"header field dim: shape {warp.shape} is not (X, Y, Z, 3)")
    affine = np.asarray(img.affine, float)
    shape = warp.shape[:3]
    src_shape = shape if source_shape is None else tuple(source_shape)
    src_affine = affine if source_affine is None else source_affine
    s_ref, s_src = fsl_axes(affine, shape), fsl_axes(src_affine, src_shape)
    ijk = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij"), -1)
    world = ijk @ affine[:3, :3].T + affine[:3, 3]
    f_src = (world @ s_ref[:3, :3].T + s_ref[:3, 3]) + warp
    inv = np.linalg.inv(s_src)
    moved = f_src @ inv[:3, :3].T + inv[:3, 3]
    return (moved - world).astype(np.float32), affine


def _is_x5(path: Path) -> bool:
    import h5py

    try:
        with h5py.File(str(path), "r") as h5:
            return h5.attrs.get("Format") in ("X5", b"X5")
    except OSError:
        return False


def load_chain(path: str | Path) -> list[AffineStep | FieldStep]:
    """Read any supported transform file as a chain (application order).

    ``.txt``/``.tfm``/``.mat``: ITK affine; ``.nii``/``.nii.gz``: ITK/ANTs
    displacement field; ``.h5``: ITK composite, or X5 if the file says so;
    ``.x5``: X5.
    """
    path = Path(path)
    suffix = full_suffix(path).lower()
    if not path.exists():
        raise InputError(str(path), "transform file not found")
    if suffix in AFFINE_SUFFIXES:
        return read_itk_text_chain(path)
    if suffix in FIELD_SUFFIXES:
        disp, affine = read_itk_field(path)
        return [FieldStep(disp, affine)]
    if suffix == ".x5" or (suffix == ".h5" and _is_x5(path)):
        return read_x5(path)
    if suffix == ".h5":
        return read_itk_composite(path)
    raise InputError(str(path), f"suffix {suffix!r}: expected .txt, .tfm, .mat, .nii[.gz], .h5 or .x5")


def save_chain(outputs: OutputSet, path: str | Path, chain: Sequence[AffineStep | FieldStep]) -> Path:
    """Write a chain un-folded: ITK composite for ``.h5``, X5 for ``.x5``; a single
    affine or field may also go to its own ITK format."""
    path = Path(path)
    suffix = full_suffix(path).lower()
    if suffix == ".h5":
        return write_itk_composite(outputs, path, chain)
    if suffix == ".x5":
        return write_x5(outputs, path, chain)
    if len(chain) == 1 and suffix in AFFINE_SUFFIXES and isinstance(chain[0], AffineStep):
        return write_itk_affine(outputs, path, chain[0].matrix_ras)
    if len(chain) == 1 and suffix in FIELD_SUFFIXES and isinstance(chain[0], FieldStep):
        return write_itk_field(outputs, path, chain[0].disp_ras_mm, chain[0].affine)
    raise InputError(str(path), f"suffix {suffix!r} cannot hold this chain; use .h5 (ITK) or .x5")

