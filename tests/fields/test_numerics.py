"""The shared numerics (potfield.fields._numerics) against independent references, and the
error boundary of the physics package (fields import nothing of the tool around them)."""

from __future__ import annotations

import ast
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
import xarray as xr

from potfield.fields import _numerics as nm
from potfield.fields.errors import BadParameter, FieldError, IllPosed, NotEnoughData


# ------------------------------------------------------------------------------------------------
# damped least squares
# ------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("damping", [0.0, 1e-3, 0.7])
def test_damped_lstsq_matches_the_augmented_system(damping):
    # Reference: scipy.linalg.lstsq on the augmented system [A; sqrt(mu) I] x = [b; 0], whose
    # least-squares solution is the Tikhonov solution (Aster, Borchers and Thurber 2013,
    # Parameter Estimation and Inverse Problems, eq. 4.4).
    rng = np.random.default_rng(3)
    a = rng.normal(size=(40, 7))
    b = rng.normal(size=40)
    ours = nm.damped_lstsq(a.copy(), b, damping)
    aug = np.vstack([a, np.sqrt(damping) * np.eye(7)])
    ref = scipy.linalg.lstsq(aug, np.r_[b, np.zeros(7)])[0]
    np.testing.assert_allclose(ours, ref, rtol=1e-9, atol=1e-12)


def test_damped_lstsq_per_unknown_damping_and_rank_deficient():
    # Reference: numpy.linalg.lstsq on the augmented system with diag(sqrt(mu_j)) (same identity).
    rng = np.random.default_rng(4)
    a = rng.normal(size=(30, 5))
    b = rng.normal(size=30)
    mu = np.array([0.0, 1e-2, 1.0, 10.0, 0.5])
    aug = np.vstack([a, np.diag(np.sqrt(mu))])
    ref = np.linalg.lstsq(aug, np.r_[b, np.zeros(5)], rcond=None)[0]
    np.testing.assert_allclose(nm.damped_lstsq(a, b, mu), ref, rtol=1e-9, atol=1e-12)
    # two equal columns and no damping: singular normal matrix; the fallback still returns a
    # least-squares solution (same fitted values as numpy.linalg.lstsq's minimum-norm one)
    twin = np.column_stack([a[:, 0], a[:, 0], a[:, 1]])
    x = nm.damped_lstsq(twin, b, 0.0)
    ref = np.linalg.lstsq(twin, b, rcond=None)[0]
    np.testing.assert_allclose(twin @ x, twin @ ref, rtol=1e-7, atol=1e-9)


def test_one_normal_matrix_serves_many_dampings():
    # Reference: numpy's general product A^T A, and scipy.linalg.lstsq on the augmented system
    # [A; sqrt(mu) I] (Aster, Borchers and Thurber 2013, eq. 4.4) for every damping.
    rng = np.random.default_rng(5)
    a = rng.normal(size=(60, 9))
    b = rng.normal(size=60)
    normal = nm.normal_matrix(a)
    np.testing.assert_allclose(normal, a.T @ a, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(nm.normal_matrix(np.asfortranarray(a)), a.T @ a, rtol=1e-12, atol=1e-12)
    kept = normal.copy()
    for damping in (1e-6, 1e-2, 3.0):
        aug = np.vstack([a, np.sqrt(damping) * np.eye(9)])
        ref = scipy.linalg.lstsq(aug, np.r_[b, np.zeros(9)])[0]
        np.testing.assert_allclose(
            nm.solve_damped_normal(normal, a.T @ b, damping), ref, rtol=1e-9, atol=1e-12
        )
    np.testing.assert_array_equal(normal, kept)  # the normal matrix is not modified


# ------------------------------------------------------------------------------------------------
# block median
# ------------------------------------------------------------------------------------------------
def _sorted_rows(*columns):
    rows = np.column_stack(columns)
    return rows[np.lexsort((rows[:, 0], rows[:, 1]))]


@pytest.mark.parametrize("region", [(0.0, 1000.0, 0.0, 600.0), None])
def test_block_median_stretched_matches_verde(region):
    # Reference: verde.BlockReduce(numpy.median, spacing, drop_coords=False) with its defaults
    # (blocks stretched to fit the region, adjust="spacing"; Uieda 2018, JOSS 3:957). Without a
    # region the data's bounding box (1000 x 600 is not a multiple of 130 m) tests the stretch.
    import verde as vd

    rng = np.random.default_rng(7)
    e = rng.uniform(0, 1000, 4000)
    n = rng.uniform(0, 600, 4000)
    u = rng.uniform(100, 120, 4000)
    d = rng.normal(0, 1, 4000)
    spacing = 100.0 if region else 130.0
    (be, bn, bu), bd = nm.block_median(e, n, u, d, spacing, region=region, stretch=True)
    reducer = vd.BlockReduce(np.median, spacing=spacing, region=region, drop_coords=False)
    (ve, vn, vu), vdat = reducer.filter((e, n, u), d)
    ours, theirs = _sorted_rows(be, bn, bu, bd), _sorted_rows(ve, vn, vu, vdat)
    assert ours.shape == theirs.shape
    np.testing.assert_allclose(ours, theirs)


def test_block_median_square_blocks_match_a_brute_force_median():
    # Reference: numpy.median of the points in each square block, found by a Python loop over
    # the blocks (independent of the sort-based grouping).
    rng = np.random.default_rng(8)
    e, n = rng.uniform(0, 730, 900), rng.uniform(0, 410, 900)
    u, d = rng.uniform(0, 5, 900), rng.normal(size=900)
    (be, bn, bu), bd = nm.block_median(e, n, u, d, 100.0)
    col = np.minimum(np.floor((e - e.min()) / 100.0), np.floor((e.max() - e.min()) / 100.0))
    row = np.floor((n - n.min()) / 100.0)
    ref = [
        [np.median(v[(col == c) & (row == r)]) for v in (e, n, u, d)]
        for r in np.unique(row)
        for c in np.unique(col[row == r])
    ]
    np.testing.assert_allclose(np.column_stack([be, bn, bu, bd]), np.array(ref))


def test_group_median_matches_numpy_median():
    # Reference: numpy.median per group.
    rng = np.random.default_rng(9)
    groups = rng.integers(0, 17, 500)
    groups[:17] = np.arange(17)  # every group non-empty
    values = rng.normal(size=500)
    ref = [np.median(values[groups == g]) for g in range(17)]
    np.testing.assert_allclose(nm.group_median(values, groups, 17), ref)


# ------------------------------------------------------------------------------------------------
# nearest-neighbour spacing
# ------------------------------------------------------------------------------------------------
def test_nearest_neighbour_distances_match_brute_force():
    # Reference: brute-force distance matrix (numpy), the smallest off-diagonal entry per row.
    rng = np.random.default_rng(10)
    e, n = rng.uniform(0, 500, 300), rng.uniform(0, 500, 300)
    full = np.hypot(e[:, None] - e[None, :], n[:, None] - n[None, :])
    np.fill_diagonal(full, np.inf)
    ref = full.min(axis=1)
    np.testing.assert_allclose(nm.nearest_neighbour_distances(e, n), ref)
    pick = np.array([5, 17, 250])
    np.testing.assert_allclose(nm.nearest_neighbour_distances(e, n, points=pick), ref[pick])
    assert nm.median_spacing(e, n) == pytest.approx(float(np.median(ref)))
    assert np.isnan(nm.median_spacing([1.0], [2.0]))
    # a regular 10 m grid: every point's nearest neighbour is 10 m away (geometry)
    ge, gn = np.meshgrid(np.arange(0, 100, 10.0), np.arange(0, 50, 10.0))
    assert nm.median_spacing(ge, gn) == pytest.approx(10.0)


# ------------------------------------------------------------------------------------------------
# bilinear sampling
# ------------------------------------------------------------------------------------------------
def test_sample_grid_matches_scipy_regular_grid_interpolator():
    # Reference: scipy.interpolate.RegularGridInterpolator(method="linear") on the ascending
    # axes; and bilinear interpolation reproduces a bilinear function exactly (handbook fact).
    from scipy.interpolate import RegularGridInterpolator

    east = np.linspace(0, 900, 10)
    north = np.linspace(0, 400, 5)
    ee, nn = np.meshgrid(east, north)
    values = 3.0 + 0.01 * ee - 0.02 * nn + 1e-5 * ee * nn
    grid = xr.DataArray(
        values[::-1], dims=("northing", "easting"), coords={"northing": north[::-1], "easting": east}
    )  # descending rows
    rng = np.random.default_rng(11)
    pe, pn = rng.uniform(-50, 950, 200), rng.uniform(-20, 420, 200)
    ours = nm.sample_grid(grid, pe, pn)
    ref = RegularGridInterpolator((north, east), values, bounds_error=False, fill_value=np.nan)(
        np.column_stack([pn, pe])
    )
    np.testing.assert_allclose(ours, ref, equal_nan=True)
    inside = (pe >= 0) & (pe <= 900) & (pn >= 0) & (pn <= 400)
    assert np.isnan(ours[~inside]).all() and (~inside).any()
    exact = 3.0 + 0.01 * pe - 0.02 * pn + 1e-5 * pe * pn
    np.testing.assert_allclose(ours[inside], exact[inside], rtol=1e-12)
    # an empty (NaN) cell makes the points around it NaN
    holed = grid.copy()
    holed[2, 4] = np.nan
    assert np.isnan(nm.sample_grid(holed, [400.0], [200.0])).all()


# ------------------------------------------------------------------------------------------------
# the error boundary
# ------------------------------------------------------------------------------------------------
FIELDS = Path(nm.__file__).resolve().parent
FORBIDDEN = (
    "potfield.errors",
    "potfield.config",
    "potfield.stages",
    "potfield.pipeline",
    "potfield.cli",
    "potfield.survey",
)


def _imports(path: Path) -> list[str]:
    """Absolute module names imported by a file of potfield.fields (relative ones resolved)."""
    package = ".".join(("potfield",) + path.relative_to(FIELDS.parent).with_suffix("").parts[:-1])
    names = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            names.extend(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            names.append(module)
            names.extend(f"{module}.{alias.name}" for alias in node.names)
    return names


def test_fields_import_nothing_of_the_tool():
    # Architecture rule (DEVELOPERS.md, "Errors"): physics knows no configuration, stage or
    # pipeline; inside potfield it may import only potfield.fields.* and potfield.io.
    files = sorted(FIELDS.rglob("*.py"))
    assert len(files) > 20
    bad = []
    for path in files:
        for name in _imports(path):
            if name.startswith(FORBIDDEN) or (
                name.startswith("potfield.") and not name.startswith(("potfield.fields", "potfield.io"))
            ):
                bad.append(f"{path.relative_to(FIELDS)}: {name}")
    assert not bad, bad


def test_field_errors_are_value_errors_with_a_hint():
    err = NotEnoughData("only 2 stations", hint="add stations")
    assert isinstance(err, ValueError) and isinstance(err, FieldError)
    assert str(err) == "only 2 stations (hint: add stations)" and err.message == "only 2 stations"


def test_translate_adds_key_and_fix_and_leaves_other_errors():
    from potfield.errors import ConfigError, InputDataError
    from potfield.stages._boundary import Rule, translate

    with pytest.raises(ConfigError) as info:
        with translate(ConfigError, key="separate.regional_height_m"):
            raise BadParameter("regional height -1 m must be positive", hint="give metres > 0")
    assert str(info.value) == (
        "key 'separate.regional_height_m': regional height -1 m must be positive (fix: give metres > 0)"
    )
    with pytest.raises(InputDataError, match="key 'separate.damping'.*fix: add stations"):
        with translate(
            {
                IllPosed: Rule(InputDataError, key="separate.damping", fix="add stations"),
                FieldError: ConfigError,
            }
        ):
            raise IllPosed("rank 3 for 6 unknowns")
    with pytest.raises(ValueError, match="plain"):  # a bare ValueError is a bug: not caught
        with translate(ConfigError, key="x"):
            raise ValueError("plain")
    with pytest.raises(NotEnoughData):  # no matching entry: unchanged
        with translate({IllPosed: ConfigError}):
            raise NotEnoughData("few")
