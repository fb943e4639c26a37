"""Transform files (nl_unwarp.io.transforms), checked against the tools that read them.

References: SimpleITK (ITK 5.4) and antspyx read and write ITK affine, field
and composite files; nitransforms reads and writes X5 and reads ITK files.
FSL-style warps are checked on hand-built cases against FSL's documented
coordinate convention (from memory, see ``fsl_axes``): nitransforms is used
only on axis-aligned grids, where its FSL reader is valid (CONVENTIONS.md 4).
"""

from __future__ import annotations

import h5py
import nibabel as nib
import numpy as np
import pytest
import scipy.io
import SimpleITK as sitk
from sampling import sitk_points

import nl_unwarp.io.itk as itk_module
from nl_unwarp.compose import AffineStep, FieldStep, compose_chain
from nl_unwarp.errors import InputError
from nl_unwarp.io import transforms as tio
from nl_unwarp.io.atomic import OutputSet

#: Point agreement between our mapping and ITK's, mm: both are double
#: precision; the fields are float32 on disk, so a few ulp of 10 mm.
POINT_TOL_MM = 1e-5
#: antspyx applies transforms in single precision (its Precision: float).
ANTS_POINT_TOL_MM = 1e-3
#: Trilinear vs cubic-spline field interpolation of the smooth test fields
#: (a few mm over half a period across ~20 voxels; measured 1e-3), mm.
LINEAR_VS_CUBIC_MM = 0.01
LPS = np.array([-1.0, -1.0, 1.0])


def _random_affine(seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    m = np.eye(4)
    m[:3, :3] += rng.normal(0.0, 0.08, (3, 3))
    m[:3, 3] = rng.normal(0.0, 6.0, 3)
    return m


def _grid(kind: str, shape=(12, 14, 10)) -> np.ndarray:
    """Grid affines: RAS, LPS-stored, oblique, anisotropic."""
    zooms = {"ras": (3.0, 3.0, 3.0), "lps": (3.0, 3.0, 3.0), "oblique": (3.0, 2.5, 4.0),
             "aniso": (2.0, 3.0, 4.5)}[kind]
    rot = np.eye(3)
    if kind == "lps":
        rot = np.diag([-1.0, -1.0, 1.0])
    elif kind == "oblique":
        a, b = np.deg2rad(17.0), np.deg2rad(-9.0)
        rz = np.array([[np.cos(a), -np.sin(a), 0], [np.sin(a), np.cos(a), 0], [0, 0, 1]])
        rx = np.array([[1, 0, 0], [0, np.cos(b), -np.sin(b)], [0, np.sin(b), np.cos(b)]])
        rot = rz @ rx
    aff = np.eye(4)
    aff[:3, :3] = rot * np.array(zooms)
    aff[:3, 3] = -aff[:3, :3] @ ((np.array(shape) - 1) / 2.0) + [2.0, -3.0, 1.0]
    return aff


def _smooth_field(shape, seed: int, amplitude_mm: float = 3.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    ijk = np.stack(np.meshgrid(*[np.linspace(0, 1, n) for n in shape], indexing="ij"), -1)
    phase = rng.uniform(0, 2 * np.pi, (3, 3))
    # At most half a period across the grid: smooth on the voxel scale.
    return np.stack([amplitude_mm * np.sin(ijk @ (phase[c] / 6) + c)
                     for c in range(3)], -1).astype(np.float32)


def _points(seed: int, n: int = 40, spread_mm: float = 12.0) -> np.ndarray:
    return np.random.default_rng(seed).uniform(-spread_mm, spread_mm, (n, 3))


def _chain_points(chain, points):
    """Our kernel on a one-row target grid through the given points."""
    result = []
    for p in points:
        aff = np.eye(4)
        aff[:3, 3] = p
        result.append(p + compose_chain(chain, (1, 1, 1), aff, on_outside="ignore").disp_ras_mm[0, 0, 0])
    return np.array(result)


@pytest.mark.parametrize("suffix", [".txt", ".tfm", ".mat"])
def test_affine_written_is_read_by_simpleitk_and_antspyx(tmp_path, suffix):
    import ants

    matrix = _random_affine(1)
    path = tmp_path / f"affine{suffix}"
    with OutputSet() as out:
        tio.write_itk_affine(out, path, matrix)
    pts = _points(2)
    expected = pts @ matrix[:3, :3].T + matrix[:3, 3]
    # SimpleITK reads the file and maps LPS points (ITK's frame).
    np.testing.assert_allclose(sitk_points(sitk.ReadTransform(str(path)), pts), expected,
                               atol=POINT_TOL_MM)
    ants_tx = ants.read_transform(str(path))
    got = np.array([ants_tx.apply_to_point(tuple(p * LPS)) for p in pts]) * LPS
    np.testing.assert_allclose(got, expected, atol=ANTS_POINT_TOL_MM)
    # Lossless round trip through our reader.
    np.testing.assert_allclose(tio.read_itk_affine(path), matrix, rtol=0, atol=1e-12)


@pytest.mark.parametrize("suffix", [".txt", ".mat"])
def test_affine_with_centre_written_by_simpleitk_is_read(tmp_path, suffix):
    # A centre (fixed parameters) changes the offset: y = M (x - c) + c + t (ITK).
    tx = sitk.AffineTransform(3)
    tx.SetMatrix([1.02, 0.05, -0.01, -0.04, 0.97, 0.03, 0.02, -0.06, 1.05])
    tx.SetTranslation([3.0, -4.0, 5.0])
    tx.SetCenter([10.0, 20.0, -30.0])
    path = tmp_path / f"sitk{suffix}"
    sitk.WriteTransform(tx, str(path))
    matrix = tio.read_itk_affine(path)
    pts = _points(3)
    np.testing.assert_allclose(pts @ matrix[:3, :3].T + matrix[:3, 3], sitk_points(tx, pts),
                               atol=POINT_TOL_MM)


def _sitk_linear(kind: str):
    """SimpleITK linear transforms of each type we read, with centres and non-trivial parameters."""
    if kind == "translation":
        return sitk.TranslationTransform(3, (3.0, -4.0, 5.0))
    if kind in ("euler", "euler-zyx"):
        tx = sitk.Euler3DTransform((10.0, 20.0, -30.0), 0.3, -0.2, 0.5, (3.0, -4.0, 5.0))
        tx.SetComputeZYX(kind == "euler-zyx")
        return tx
    if kind == "versor":
        tx = sitk.VersorRigid3DTransform((0.1, -0.2, 0.3, float(np.sqrt(1 - 0.14))), (3.0, -4.0, 5.0))
        tx.SetCenter((10.0, 20.0, -30.0))
        return tx
    if kind == "scale":
        tx = sitk.ScaleTransform(3, (1.1, 0.9, 1.2))
        tx.SetCenter((10.0, 20.0, -30.0))
        return tx
    if kind in ("scale-versor", "scale-skew-versor"):
        tx = sitk.ScaleVersor3DTransform() if kind == "scale-versor" else sitk.ScaleSkewVersor3DTransform()
        skews = (0.05, -0.03, 0.02, 0.04, -0.01, 0.06) if kind == "scale-skew-versor" else ()
        tx.SetParameters((0.1, -0.05, 0.2, 3.0, -4.0, 5.0, 1.1, 0.9, 1.2) + skews)
        tx.SetCenter((10.0, 20.0, -30.0))
        return tx
    tx = sitk.Similarity3DTransform()
    tx.SetParameters((0.1, -0.05, 0.2, 3.0, -4.0, 5.0, 1.1))
    tx.SetCenter((10.0, 20.0, -30.0))
    return tx


LINEAR_KINDS = ["translation", "euler", "euler-zyx", "versor", "similarity", "scale", "scale-versor",
                "scale-skew-versor"]


@pytest.mark.parametrize("suffix", [".txt", ".mat"])
@pytest.mark.parametrize("kind", LINEAR_KINDS)
def test_linear_types_written_by_simpleitk_are_read(tmp_path, kind, suffix):
    """Reference: SimpleITK maps the same points through the transform it wrote."""
    tx = _sitk_linear(kind)
    path = tmp_path / f"{kind}{suffix}"
    sitk.WriteTransform(tx, str(path))
    matrix = tio.read_itk_affine(path)
    pts = _points(5, spread_mm=40.0)
    expected = sitk_points(tx, pts)
    np.testing.assert_allclose(pts @ matrix[:3, :3].T + matrix[:3, 3], expected, atol=POINT_TOL_MM)
    assert np.abs(expected - pts).max() > 1.0  # not an identity
    # The same through the chain loader.
    np.testing.assert_allclose(_chain_points(tio.load_chain(path), pts), expected, atol=POINT_TOL_MM)


def test_composite_text_file_written_by_simpleitk_is_a_chain(tmp_path):
    """ITK text composite: members in ITK order (the last applied first), as SimpleITK reads it."""
    members = [_sitk_linear("similarity"), _sitk_linear("euler"), _sitk_linear("translation")]
    path = tmp_path / "composite.txt"
    sitk.WriteTransform(sitk.CompositeTransform(members), str(path))
    reference = sitk.ReadTransform(str(path))
    chain = tio.load_chain(path)
    assert len(chain) == 3
    pts = _points(6, spread_mm=40.0)
    expected = sitk_points(reference, pts)
    np.testing.assert_allclose(_chain_points(chain, pts), expected, atol=POINT_TOL_MM)
    matrix = tio.read_itk_affine(path)  # the composite's product
    np.testing.assert_allclose(pts @ matrix[:3, :3].T + matrix[:3, 3], expected, atol=POINT_TOL_MM)
    # Negative control: the members in file order would be the wrong chain.
    wrong = _chain_points(chain[::-1], pts)
    assert np.abs(wrong - expected).max() > 100 * POINT_TOL_MM


def test_composite_h5_with_linear_members_is_read(tmp_path):
    members = [_sitk_linear("versor"), _sitk_linear("euler-zyx")]
    path = tmp_path / "composite.h5"
    sitk.WriteTransform(sitk.CompositeTransform(members), str(path))
    pts = _points(7, spread_mm=40.0)
    np.testing.assert_allclose(_chain_points(tio.load_chain(path), pts),
                               sitk_points(sitk.ReadTransform(str(path)), pts), atol=POINT_TOL_MM)


def test_ambiguous_and_unsupported_text_files_are_refused(tmp_path):
    # Two transforms without a composite header: ITK does not define the order.
    text = "#Insight Transform File V1.0\n"
    for n in range(2):
        text += (f"#Transform {n}\nTransform: AffineTransform_double_3_3\n"
                 "Parameters: 1 0 0 0 1 0 0 0 1 1 2 3\nFixedParameters: 0 0 0\n")
    (tmp_path / "list.txt").write_text(text)
    with pytest.raises(InputError, match="CompositeTransform header"):
        tio.load_chain(tmp_path / "list.txt")
    planar = sitk.Euler2DTransform((1.0, 2.0), 0.3)  # a 2-D transform: not one of ours
    sitk.WriteTransform(planar, str(tmp_path / "planar.txt"))
    with pytest.raises(InputError, match="not supported"):
        tio.read_itk_affine(tmp_path / "planar.txt")
    bad = text.split("#Transform 1")[0].replace("Parameters: 1 0 0 0 1 0 0 0 1 1 2 3",
                                                 "Parameters: 1 0 0")
    (tmp_path / "short.txt").write_text(bad)
    with pytest.raises(InputError, match="expected 12 values"):
        tio.read_itk_affine(tmp_path / "short.txt")


def test_mat_layout_matches_simpleitk(tmp_path):
    # Same variable names, shapes and types as the MATLAB v4 file ITK writes.
    matrix = _random_affine(4)
    ours = tmp_path / "ours.mat"
    with OutputSet() as out:
        tio.write_itk_affine(out, ours, matrix)
    ref = tmp_path / "sitk.mat"
    sitk.WriteTransform(sitk.ReadTransform(str(ours)), str(ref))
    a, b = scipy.io.loadmat(str(ours)), scipy.io.loadmat(str(ref))
    keys = sorted(k for k in a if not k.startswith("__"))
    assert keys == sorted(k for k in b if not k.startswith("__"))
    for key in keys:
        assert a[key].shape == b[key].shape and a[key].dtype == b[key].dtype
        np.testing.assert_allclose(a[key], b[key], atol=1e-12)


def _example_chain(kind: str):
    # Grids wide enough that test points stay several voxels from their edges
    # (nitransforms' cubic prefilter pads with zeros: its edge voxels differ).
    shape = (22, 24, 20)
    aff = _grid(kind, shape)
    field = FieldStep(_smooth_field(shape, 5), aff)
    other = FieldStep(_smooth_field((19, 18, 21), 6, 2.0), _grid("aniso", (19, 18, 21)))
    return [other, AffineStep(_random_affine(7)), field]


@pytest.mark.parametrize("kind", ["ras", "lps", "oblique", "aniso"])
def test_composite_h5_is_read_by_simpleitk(tmp_path, kind):
    chain = _example_chain(kind)
    path = tmp_path / "chain.h5"
    with OutputSet() as out:
        tio.write_itk_composite(out, path, chain)
    tx = sitk.ReadTransform(str(path))
    assert tx.GetName() == "CompositeTransform"
    pts = _points(8, spread_mm=10.0)
    # ITK applies the composite's last member first: our chain, in our order.
    np.testing.assert_allclose(sitk_points(tx, pts), _chain_points(chain, pts), atol=POINT_TOL_MM)


def test_composite_h5_is_read_by_antspyx(tmp_path):
    import ants

    chain = _example_chain("oblique")
    path = tmp_path / "chain.h5"
    with OutputSet() as out:
        tio.write_itk_composite(out, path, chain)
    tx = ants.read_transform(str(path))
    pts = _points(9, spread_mm=10.0)
    got = np.array([tx.apply_to_point(tuple(p * LPS)) for p in pts]) * LPS
    np.testing.assert_allclose(got, _chain_points(chain, pts), atol=ANTS_POINT_TOL_MM)


def test_composite_h5_layout_matches_simpleitk(tmp_path):
    chain = _example_chain("oblique")
    ours = tmp_path / "ours.h5"
    with OutputSet() as out:
        tio.write_itk_composite(out, ours, chain)
    ref = tmp_path / "sitk.h5"
    sitk.WriteTransform(sitk.ReadTransform(str(ours)), str(ref))
    with h5py.File(ours, "r") as a, h5py.File(ref, "r") as b:
        ga, gb = a["TransformGroup"], b["TransformGroup"]
        assert sorted(ga) == sorted(gb)
        for key in gb:
            assert sorted(ga[key]) == sorted(gb[key])
            assert ga[key]["TransformType"][0] == gb[key]["TransformType"][0]
            for name in ("TransformParameters", "TransformFixedParameters"):
                if name in gb[key]:
                    np.testing.assert_allclose(ga[key][name][()], gb[key][name][()], atol=1e-9)


def test_composite_written_by_simpleitk_is_read(tmp_path):
    # A file ITK wrote itself: an affine with a centre and a field (oblique grid).
    shape = (7, 6, 5)
    disp = _smooth_field(shape, 10)
    img = sitk.GetImageFromArray(np.ascontiguousarray(disp.transpose(2, 1, 0, 3)).astype(float),
                                 isVector=True)
    img.SetSpacing((2.0, 3.0, 2.5))
    img.SetOrigin((5.0, -4.0, 3.0))
    rot = _grid("oblique")[:3, :3] / np.linalg.norm(_grid("oblique")[:3, :3], axis=0)
    img.SetDirection(tuple(rot.ravel()))
    field = sitk.DisplacementFieldTransform(sitk.Image(img))
    aff = sitk.AffineTransform(3)
    aff.SetMatrix([1.0, 0.1, 0.0, 0.0, 0.95, 0.05, 0.02, 0.0, 1.03])
    aff.SetCenter([1.0, 2.0, 3.0])
    aff.SetTranslation([0.5, -1.0, 2.0])
    path = tmp_path / "sitk.h5"
    sitk.WriteTransform(sitk.CompositeTransform([aff, field]), str(path))
    chain = tio.read_itk_composite(path)
    assert [type(s) for s in chain] == [FieldStep, AffineStep]
    pts = _points(11, spread_mm=6.0) + np.array([-5.0, 4.0, 8.0])
    ref = sitk_points(sitk.ReadTransform(str(path)), pts)
    np.testing.assert_allclose(_chain_points(chain, pts), ref, atol=POINT_TOL_MM)


def test_x5_round_trip_and_nitransforms_mapping(tmp_path):
    from nitransforms.manip import TransformChain

    chain = _example_chain("oblique")
    path = tmp_path / "chain.x5"
    with OutputSet() as out:
        tio.write_x5(out, path, chain)
    back = tio.read_x5(path)
    assert [type(s) for s in back] == [type(s) for s in chain]
    for a, b in zip(back, chain, strict=True):
        if isinstance(a, AffineStep):
            np.testing.assert_array_equal(a.matrix_ras, b.matrix_ras)
        else:
            np.testing.assert_array_equal(a.disp_ras_mm, b.disp_ras_mm)
            np.testing.assert_allclose(a.affine, b.affine, atol=1e-12)
    # nitransforms maps points in the same order (first applied first). Its
    # fields are cubic-spline interpolated, ours trilinear (as ITK): they
    # differ by an interpolation error, well below the millimetres a wrong
    # order would give. Points stay inside every field's grid.
    nt_chain = TransformChain.from_filename(str(path), fmt="X5")
    pts = _points(12, spread_mm=5.0)
    np.testing.assert_allclose(nt_chain.map(pts), _chain_points(chain, pts), atol=LINEAR_VS_CUBIC_MM)
    reversed_order = _chain_points(chain[::-1], pts)
    assert np.abs(nt_chain.map(pts) - reversed_order).max() > 10 * LINEAR_VS_CUBIC_MM


def test_itk_module_names_still_importable():
    # The field functions live in io.itk; io.transforms re-exports the same objects.
    assert tio.write_itk_field is itk_module.write_itk_field
    assert tio.read_itk_field is itk_module.read_itk_field


@pytest.mark.parametrize("kind", ["ras", "lps", "oblique", "aniso"])
def test_fsl_warp_one_voxel_steps(tmp_path, kind):
    """Hand-built: a displacement of exactly one voxel along voxel axis a is,
    in FSL's scaled-voxel mm, +zoom_a along FSL axis a -- except the first axis,
    reversed (-zoom_0) when the affine's determinant is positive (FSL's
    documented convention, from memory). Holds on oblique grids too."""
    shape = (6, 5, 4)
    aff = _grid(kind, shape)
    zooms = np.linalg.norm(aff[:3, :3], axis=0)
    sign0 = -1.0 if np.linalg.det(aff[:3, :3]) > 0 else 1.0
    for axis in range(3):
        disp = np.broadcast_to(aff[:3, axis], shape + (3,)).astype(np.float32)
        path = tmp_path / f"warp{axis}.nii.gz"
        with OutputSet() as out:
            tio.write_fsl_warp(out, path, disp, aff)
        warp = np.asarray(nib.load(path).dataobj)
        expected = np.zeros(3)
        expected[axis] = zooms[axis] * (sign0 if axis == 0 else 1.0)
        np.testing.assert_allclose(warp.reshape(-1, 3), np.broadcast_to(expected, (warp[..., 0].size, 3)),
                                   atol=1e-5)
        back, back_aff = tio.read_fsl_warp(path)
        np.testing.assert_allclose(back, disp, atol=1e-5)


@pytest.mark.parametrize("kind", ["ras", "las"])
def test_fsl_warp_against_nitransforms_on_axis_aligned_grids(tmp_path, kind):
    from nitransforms.nonlinear import DenseFieldTransform

    # nitransforms' FSL reader only negates x: valid where j and k point A and S.
    shape = (8, 7, 6)
    aff = np.diag([3.0, 3.0, 3.0, 1.0]) if kind == "ras" else np.diag([-3.0, 3.0, 3.0, 1.0])
    aff[:3, 3] = [-10.0, -12.0, -8.0]
    disp = _smooth_field(shape, 13)
    path = tmp_path / "warp.nii.gz"
    with OutputSet() as out:
        tio.write_fsl_warp(out, path, disp, aff)
    nt = DenseFieldTransform.from_filename(str(path), fmt="fsl")
    np.testing.assert_allclose(nt._deltas, disp, atol=1e-5)


def test_fsl_warp_with_a_different_source_grid(tmp_path):
    # The warp maps reference FSL mm to source FSL mm: a translated, flipped
    # source grid changes the numbers but not the world mapping.
    shape = (6, 6, 6)
    ref = _grid("oblique", shape)
    source = np.diag([-2.0, 2.0, 2.0, 1.0])
    source[:3, 3] = [20.0, -15.0, -10.0]
    disp = _smooth_field(shape, 14)
    path = tmp_path / "warp.nii.gz"
    with OutputSet() as out:
        tio.write_fsl_warp(out, path, disp, ref, source_shape=(20, 18, 16), source_affine=source)
    back, _ = tio.read_fsl_warp(path, source_shape=(20, 18, 16), source_affine=source)
    np.testing.assert_allclose(back, disp, atol=1e-4)
    # And by hand at one voxel: FSL source coordinates of the world point.
    warp = np.asarray(nib.load(path).dataobj)
    p = ref[:3, :3] @ [2, 3, 4] + ref[:3, 3]
    q = p + disp[2, 3, 4]
    q_idx = np.linalg.solve(source[:3, :3], q - source[:3, 3])
    f_src = q_idx * 2.0  # det < 0 (LAS-like): no reversal
    p_fsl = np.array([5 - 2, 3, 4]) * np.linalg.norm(ref[:3, :3], axis=0)  # det > 0: i reversed
    np.testing.assert_allclose(warp[2, 3, 4], f_src - p_fsl, atol=1e-4)


def test_load_and_save_chain_dispatch(tmp_path):
    chain = _example_chain("ras")
    with OutputSet() as out:
        tio.save_chain(out, tmp_path / "c.h5", chain)
        tio.save_chain(out, tmp_path / "c.x5", chain)
        tio.save_chain(out, tmp_path / "a.mat", chain[1:2])
        tio.save_chain(out, tmp_path / "f.nii.gz", chain[2:])
    for name, n in (("c.h5", 3), ("c.x5", 3), ("a.mat", 1), ("f.nii.gz", 1)):
        loaded = tio.load_chain(tmp_path / name)
        assert len(loaded) == n
    np.testing.assert_allclose(tio.load_chain(tmp_path / "f.nii.gz")[0].disp_ras_mm,
                               chain[2].disp_ras_mm, atol=1e-6)


def test_errors_name_the_file(tmp_path):
    with pytest.raises(InputError, match="not found"):
        tio.load_chain(tmp_path / "missing.h5")
    bad = tmp_path / "bad.txt"
    bad.write_text("hello\n")
    with pytest.raises(InputError, match="bad.txt"):
        tio.read_itk_affine(bad)
    sheared = np.eye(4)
    sheared[0, 1] = 0.5
    with pytest.raises(InputError, match="shear"), OutputSet() as out:
        tio.write_itk_composite(out, tmp_path / "s.h5",
                                [FieldStep(np.zeros((2, 2, 2, 3), np.float32), sheared)])
    assert not (tmp_path / "s.h5").exists()
    with pytest.raises(InputError, match="suffix"), OutputSet() as out:
        tio.save_chain(out, tmp_path / "c.json", [AffineStep(np.eye(4))])
