"""Equivalent-source gridding (potfield.fields.harmonic.eqsources) against fields forward-modelled by an
independent library (harmonica 0.7 prisms and point masses)."""

from __future__ import annotations

import harmonica as hm
import numpy as np
import pytest
import verde as vd

from potfield.fields.harmonic import eqsources as eqs
from potfield.fields.harmonic.eqsources.solve import LatticeProblem

G = 6.6743e-11  # CODATA 2018 gravitational constant (m^3 kg^-1 s^-2)

# Two buried prisms (west, east, south, north, bottom, top) in m and their density contrasts.
PRISMS = np.array(
    [[1200.0, 1800.0, 1000.0, 2200.0, -900.0, -400.0], [2400.0, 3100.0, 2500.0, 3000.0, -700.0, -350.0]]
)
DENSITY = np.array([400.0, -300.0])
SURVEY = (0.0, 4000.0, 0.0, 4000.0)
LINE_SPACING = 200.0
CELL = 50.0  # a quarter of the line spacing (common practice)


def truth(coordinates):
    """g_z (mGal) of the prisms: harmonica.prism_gravity (Nagy et al. 2000, J. Geodesy 74:552)."""
    return hm.prism_gravity(coordinates, PRISMS, DENSITY, field="g_z")


@pytest.fixture(scope="module")
def lines():
    """East-west lines 200 m apart, a reading every 10 m, 150 m +- 10 m above the ground."""
    rng = np.random.default_rng(7)
    east, north = np.meshgrid(np.arange(0.0, 4000.0, 10.0), np.arange(0.0, 4001.0, LINE_SPACING))
    east = east + rng.normal(0, 2, east.shape)
    north = north + rng.normal(0, 6, north.shape)
    up = 150.0 + rng.normal(0, 5, east.shape)
    coords = (east.ravel(), north.ravel(), up.ravel())
    data = truth(coords)
    reducer = vd.BlockReduce(np.median, spacing=CELL, drop_coords=False)
    blocked, bdata = reducer.filter(coords, data)
    return coords, data, tuple(np.asarray(c).ravel() for c in blocked), np.asarray(bdata).ravel()


def _grid_points(height):
    east, north = vd.grid_coordinates(SURVEY, spacing=CELL)
    return east, north, np.full(east.shape, height)


def _inside(blocked, east, north):
    # Cells within 1.5 line spacings of data and away from the survey edge (extrapolation there
    # is not gridding).
    near = vd.distance_mask(blocked[:2], maxdist=1.5 * LINE_SPACING, coordinates=(east, north))
    core = (east > 400) & (east < 3600) & (north > 400) & (north < 3600)
    return near & core


def _relative_rms(pred, true):
    return np.sqrt(np.mean((pred - true) ** 2)) / np.std(true)


@pytest.mark.parametrize("method", ["fft", "dense"])
def test_grid_matches_forward_model(lines, method):
    _, _, blocked, bdata = lines
    model = eqs.fit_equivalent_sources(
        *blocked, bdata, depth=4.5 * CELL, damping=1e-3, block_size=CELL, method=method
    )
    assert model.method == method
    east, north, up = _grid_points(150.0)
    keep = _inside(blocked, east, north)
    error = _relative_rms(model.predict((east, north, up))[keep], truth((east, north, up))[keep])
    # Bound 3 %: the block medians themselves differ from the field at the median positions by
    # ~1 % of its spread (measured on this survey), and the field between lines 200 m apart at
    # 150 m height is interpolated, not observed; Soler and Uieda (2021, GJI 227:1768, fig. 6)
    # report gridding errors of a few percent for airborne-like line data.
    assert error < 0.03, error


def test_upward_continuation_matches_analytic_field(lines):
    _, _, blocked, bdata = lines
    model = eqs.fit_equivalent_sources(
        *blocked, bdata, depth=4.5 * CELL, damping=1e-3, block_size=CELL, method="fft"
    )
    east, north, up = _grid_points(150.0 + 300.0)
    keep = _inside(blocked, east, north)
    # The forward-modelled field at 450 m is the exact upward continuation of the field at
    # 150 m (a harmonic field above its sources; Blakely 1995, Potential Theory, CUP, ch. 12).
    # Continuation smooths the interpolation errors, so the bound is the gridding bound (3 %).
    error = _relative_rms(model.predict((east, north, up))[keep], truth((east, north, up))[keep])
    assert error < 0.03, error


def test_dense_fit_reproduces_data_with_tiny_damping():
    rng = np.random.default_rng(3)
    coords = vd.scatter_points((0, 2000, 0, 2000), size=300, random_state=1, extra_coords=100.0)
    coords = (coords[0], coords[1], coords[2] + rng.normal(0, 10, 300))
    data = truth(coords)
    spacing = eqs.median_spacing(*coords[:2])
    model = eqs.fit_equivalent_sources(*coords, data, depth=2.0 * spacing, damping=1e-10, method="dense")
    # Exact interpolation: with (almost) no damping the layer passes through every datum
    # (Cordell 1992, Geophysics 57:629); tolerance set by the conditioning of 300 sources.
    resid = data - model.predict(coords)
    assert np.max(np.abs(resid)) < 1e-5 * np.ptp(data)


def test_sources_field_is_the_point_mass_potential():
    # The model's kernel is depth / r: the potential of point masses m = c depth / G, computed
    # independently by harmonica.point_gravity(field="potential") (Blakely 1995, eq. 3.4).
    rng = np.random.default_rng(5)
    coords = vd.scatter_points((0, 3000, 0, 3000), size=2000, random_state=2, extra_coords=120.0)
    data = rng.normal(size=2000)
    model = eqs.fit_equivalent_sources(
        *coords, data, depth=200.0, damping=1e-2, block_size=60.0, method="fft"
    )
    points = vd.grid_coordinates((-500, 3500, -500, 3500), spacing=37.0, extra_coords=160.0)
    masses = model.coefs * model.scale / G
    reference = hm.point_gravity(points, model.points, masses, field="potential")
    direct = model.predict(points)  # exact direct sum (small problem)
    lattice = model._predict_fft(*(np.ravel(p) for p in points)).reshape(points[0].shape)
    scale = np.max(np.abs(reference))
    assert np.max(np.abs(direct - reference)) < 1e-10 * scale
    # The pre-corrected FFT evaluation: interpolation error of the smooth far field only.
    # Random (noise-fitted) coefficients are the worst case for it: bound 5e-4.
    assert np.max(np.abs(lattice - reference)) < 5e-4 * scale


def test_lattice_operator_and_adjoint():
    rng = np.random.default_rng(11)
    coords = vd.scatter_points((0, 2000, 0, 1500), size=1500, random_state=4, extra_coords=100.0)
    coords = (coords[0], coords[1], coords[2] + rng.normal(0, 20, 1500))
    problem = LatticeProblem(*coords, np.ones(1500), 150.0, 40.0)
    coefs = rng.normal(size=problem.n_sources)
    model = problem.model(coefs, 0.0, None)
    fast = problem.forward(coefs)
    exact = model.predict(coords)  # direct sum
    # Pre-corrected FFT against direct summation (Phillips and White 1997): < 1e-4 relative.
    assert np.linalg.norm(fast - exact) < 1e-4 * np.linalg.norm(exact)
    resid = rng.normal(size=1500)
    # <A c, r> = <c, A^T r> (the adjoint used by CGLS) to rounding: double-precision FFTs.
    assert abs(fast @ resid - coefs @ problem.adjoint(resid)) < 1e-10 * np.linalg.norm(fast) * np.linalg.norm(
        resid
    )


def test_lattice_operator_small_case():
    # A small draped case (also run with numba's JIT disabled, tests/fields/test_nojit.py): the
    # pre-corrected FFT operator against the direct sum of 1/r (Phillips and White 1997, IEEE
    # Trans. CAD 16:1059), its adjoint against the dot-product identity, and the preconditioner
    # symmetric (additive Schwarz is SPD: Smith, Bjorstad and Gropp 1996).
    rng = np.random.default_rng(5)
    coords = vd.scatter_points((0, 500, 0, 400), size=120, random_state=6, extra_coords=80.0)
    coords = (coords[0], coords[1], coords[2] + 0.05 * coords[0])
    problem = LatticeProblem(*coords, np.ones(120), 120.0, 40.0)
    coefs = rng.normal(size=problem.n_sources)
    fast = problem.forward(coefs)
    model = problem.model(coefs, 0.0, None)
    exact = model.predict(coords)
    assert np.linalg.norm(fast - exact) < 1e-4 * np.linalg.norm(exact)
    above = (coords[0], coords[1], coords[2] + 30.0)  # the lattice evaluation used for big grids
    lattice = model._predict_fft(*(np.ravel(c).astype(float) for c in above))
    assert np.linalg.norm(lattice - model.predict(above)) < 1e-4 * np.linalg.norm(lattice)
    resid = rng.normal(size=120)
    assert abs(fast @ resid - coefs @ problem.adjoint(resid)) < 1e-10 * np.linalg.norm(fast) * np.linalg.norm(
        resid
    )
    blocks = problem._preconditioner(1e-3)
    x, y = rng.normal(size=(2, problem.n_sources))
    assert abs(x @ blocks.apply(y) - y @ blocks.apply(x)) < 1e-9 * abs(x @ blocks.apply(x))


def test_preconditioned_cgls_solves_the_damped_least_squares_problem():
    # The lattice solver's answer against numpy's least squares on the explicit stacked matrix
    # [W^1/2 A; sqrt(damping) I] (Paige and Saunders 1982, ACM TOMS 8:43: CGLS converges to
    # this minimiser); A's columns are the operator applied to unit vectors.
    rng = np.random.default_rng(3)
    coords = vd.scatter_points((0, 1500, 0, 1200), size=900, random_state=6, extra_coords=80.0)
    coords = (coords[0], coords[1], coords[2] + rng.normal(0, 10, 900))
    weights = rng.uniform(0.5, 2.0, 900)
    data = np.sin(coords[0] / 300.0) + np.cos(coords[1] / 250.0)
    problem = LatticeProblem(*coords, weights / weights.mean(), 120.0, 40.0)
    damping = 1e-2
    coefs, _, info = problem.solve(data, damping, tol=1e-6, maxiter=3000)
    assert info["converged"]
    cols = np.column_stack([problem.forward(unit) for unit in np.eye(problem.n_sources)])
    stacked = np.vstack([cols, np.sqrt(damping) * np.eye(problem.n_sources)])
    rhs = np.concatenate([problem.sw * data, np.zeros(problem.n_sources)])
    reference = np.linalg.lstsq(stacked, rhs, rcond=None)[0]

    def objective(c):
        return float(np.sum((stacked @ c - rhs) ** 2))

    # The minimum is reached (the coefficients themselves are ill-conditioned) and the fitted
    # field is the same.
    assert objective(coefs) < objective(reference) * (1 + 1e-5)
    assert np.linalg.norm(cols @ (coefs - reference)) < 1e-4 * np.linalg.norm(cols @ reference)


def test_source_lattice_spacing_follows_depth():
    # Dampney (1969, Geophysics 34:39): a layer 2.5-6 grid spacings deep; potfield uses depth/4
    # and never a lattice finer than the blocks.
    assert eqs.source_spacing(300.0, 50.0) == pytest.approx(75.0)
    assert eqs.source_spacing(100.0, 50.0) == 50.0
    model = eqs.fit_equivalent_sources(
        *_grid_points(150.0),
        np.zeros(_grid_points(150.0)[0].shape) + 1.0,
        depth=600.0,
        damping=1e-2,
        block_size=CELL,
        method="fft",
        maxiter=5,
    )
    assert model.lattice[2] == pytest.approx(150.0)


def test_dense_agrees_with_harmonica_equivalent_sources():
    coords = vd.scatter_points((0, 2000, 0, 2000), size=400, random_state=3, extra_coords=100.0)
    data = truth(coords)
    depth = 300.0
    ours = eqs.fit_equivalent_sources(*coords, data, depth=depth, damping=1e-9, method="dense")
    # Reference library: harmonica.EquivalentSources with the same sources (Soler and Uieda
    # 2021); both interpolate the data, so their predictions between the data agree.
    theirs = hm.EquivalentSources(damping=None, depth=depth).fit(coords, data)
    grid = vd.grid_coordinates((300, 1700, 300, 1700), spacing=50.0, extra_coords=200.0)
    a, b = ours.predict(grid), theirs.predict(grid)
    assert np.sqrt(np.mean((a - b) ** 2)) < 2e-3 * np.std(b)


def test_cross_validation_prefers_a_sensible_depth(lines):
    _, _, blocked, bdata = lines
    half = blocked[1] < 2100.0  # half the survey keeps the test fast
    blocked, bdata = tuple(c[half] for c in blocked), bdata[half]
    depths = [0.2 * CELL, 2.5 * LINE_SPACING, 20.0 * LINE_SPACING]
    scores, best = eqs.cross_validate(
        *blocked, bdata, depths=depths, dampings=[1e-3], block_size=CELL, folds=3, cv_spacing=800.0
    )
    assert set(scores.columns) >= {"depth", "damping", "r2", "r2_se", "rms", "chosen"}
    assert len(scores) == 3
    # the chosen pair is the one of highest mean R^2 (common practice)
    assert scores["chosen"].sum() == 1 and bool(scores["chosen"].iloc[0])
    assert best["r2"] == pytest.approx(scores["r2"].max())
    # Dampney (1969, Geophysics 34:39): depths of 2.5-6 data spacings (here the 200 m between
    # lines); far shallower sources alias between lines, far deeper ones (below the true
    # sources, 350-900 m deep) cannot fit the anomalies.
    assert best["depth"] == pytest.approx(2.5 * LINE_SPACING)
    assert best["r2"] > 0.95
    assert scores["r2"].iloc[-1] < best["r2"]


@pytest.mark.parametrize("method", ["fft", "dense"])
def test_save_load_round_trip(tmp_path, lines, method):
    _, _, blocked, bdata = lines
    take = slice(None) if method == "fft" else slice(None, None, 4)
    model = eqs.fit_equivalent_sources(
        *(c[take] for c in blocked), bdata[take], depth=150.0, damping=1e-2, block_size=CELL, method=method
    )
    path = eqs.save_model(tmp_path / "cache" / "eqs.npz", model)
    again = eqs.load_model(path)
    points = _grid_points(300.0)
    assert np.array_equal(model.predict(points), again.predict(points))
    assert [p.name for p in (tmp_path / "cache").iterdir()] == ["eqs.npz"]


def test_grid_method_ascending_and_drape(lines):
    _, _, blocked, bdata = lines
    model = eqs.fit_equivalent_sources(
        *blocked, bdata, depth=150.0, damping=1e-2, block_size=CELL, method="fft"
    )
    flat = model.grid(spacing=100.0, height=200.0, name="g")
    assert flat.dims == ("northing", "easting")
    assert np.all(np.diff(flat.northing) > 0) and np.all(np.diff(flat.easting) > 0)
    surface = np.full(flat.shape, 200.0)
    draped = model.grid(spacing=100.0, height=surface)
    assert np.allclose(draped.values, flat.values)


def test_bad_arguments():
    coords = vd.scatter_points((0, 100, 0, 100), size=20, random_state=0, extra_coords=10.0)
    with pytest.raises(ValueError):
        eqs.fit_equivalent_sources(*coords, np.ones(20), depth=-5.0)
    with pytest.raises(ValueError):
        eqs.fit_equivalent_sources(*coords, np.ones(20), method="spline")


def test_block_median_matches_verde():
    # Reference library: verde.BlockReduce(np.median, drop_coords=False) on blocks aligned with
    # the region (verde assigns points to the nearest block centre; with the region an exact
    # multiple of the spacing both put every point in the same block).
    import verde as vd

    from potfield.fields.harmonic.eqsources import block_median

    rng = np.random.default_rng(7)
    e = rng.uniform(0, 1000, 5000)
    n = rng.uniform(0, 600, 5000)
    u = rng.uniform(100, 120, 5000)
    d = rng.normal(0, 1, 5000)
    region = (0.0, 1000.0, 0.0, 600.0)
    (be, bn, bu), bd = block_median(e, n, u, d, 100.0, region=region)
    reducer = vd.BlockReduce(
        np.median, spacing=100.0, region=region, drop_coords=False, adjust="spacing", center_coordinates=False
    )
    (ve, vn, vu), vdat = reducer.filter((e, n, u), d)
    ours = np.c_[be, bn, bu, bd]
    theirs = np.c_[ve, vn, vu, vdat]
    ours = ours[np.lexsort((ours[:, 0], ours[:, 1]))]
    theirs = theirs[np.lexsort((theirs[:, 0], theirs[:, 1]))]
    assert ours.shape == theirs.shape
    np.testing.assert_allclose(ours, theirs)


# ------------------------------------------------------------------------------------------------
# a draped survey: sources follow the flight surface (relative depth)
# ------------------------------------------------------------------------------------------------
DRAPE_PRISMS = np.array(
    [[1500.0, 2100.0, 800.0, 3200.0, -300.0, 60.0], [2800.0, 3300.0, 2500.0, 3100.0, -500.0, 0.0]]
)
DRAPE_DENSITY = np.array([500.0, -400.0])


def _terrain(east, north):
    return 300.0 + 150.0 * np.sin(east / 900.0) * np.cos(north / 1100.0)


def _drape_truth(coordinates):
    """g_z (mGal) of prisms just below a hilly terrain: harmonica.prism_gravity."""
    return hm.prism_gravity(coordinates, DRAPE_PRISMS, DRAPE_DENSITY, field="g_z")


@pytest.fixture(scope="module")
def draped():
    """Lines 200 m apart flown 80 m above a terrain of 300 m relief; block medians of 50 m."""
    rng = np.random.default_rng(7)
    east, north = np.meshgrid(np.arange(0.0, 4000.0, 10.0), np.arange(0.0, 4001.0, 200.0))
    east = east + rng.normal(0, 2, east.shape)
    north = north + rng.normal(0, 6, north.shape)
    up = _terrain(east, north) + 80.0 + rng.normal(0, 3, east.shape)
    coords = (east.ravel(), north.ravel(), up.ravel())
    blocked, bdata = eqs.block_median(*coords, _drape_truth(coords), CELL)
    grid_e, grid_n = vd.grid_coordinates((400, 3600, 400, 3600), spacing=CELL)
    near = vd.distance_mask(blocked[:2], maxdist=1.5 * LINE_SPACING, coordinates=(grid_e, grid_n))
    grid = (grid_e[near], grid_n[near], _terrain(grid_e[near], grid_n[near]) + 80.0)
    return blocked, bdata, grid, _drape_truth(grid)


def test_relative_layer_follows_a_draped_survey(draped):
    blocked, bdata, grid, true = draped
    errors = {}
    for depth_type in ("relative", "constant"):
        model = eqs.fit_equivalent_sources(
            *blocked, bdata, depth=150.0, damping=1e-4, block_size=CELL, method="fft", depth_type=depth_type
        )
        errors[depth_type] = _relative_rms(model.predict(grid), true)
        if depth_type == "relative":
            relative = model
    # Sources a constant depth beneath the data (Cordell 1992, Geophysics 57:629) on the
    # flight surface itself, checked against harmonica's prisms (reference library): measured
    # 0.53 % for the relative layer against 0.76 % for one horizontal plane.
    assert errors["relative"] < 0.01, errors
    assert errors["relative"] < 0.8 * errors["constant"], errors
    # The layer follows the drape: its sources rise and fall with the heights of the data
    # above them (150 m below, or deeper where nearby data are lower).
    below = eqs.fit_equivalent_sources(
        *blocked, bdata, depth=150.0, damping=1e-4, block_size=CELL, method="fft", maxiter=1
    ).points
    above = _terrain(below[0], below[1]) + 80.0
    assert np.corrcoef(below[2], above)[0, 1] > 0.95
    assert np.all(below[2] <= above - 75.0 + 10.0)  # at least depth/2 under the data (+ noise)
    assert relative.info["planes"] > 1


def test_lattice_operator_when_source_planes_cross_data_levels(draped):
    # 300 m of relief and sources 100 m below the data: the highest sources lie above the lowest
    # data, so source planes and data levels interleave (the kernel core is then needed).
    blocked, _, _, _ = draped
    rng = np.random.default_rng(2)
    problem = LatticeProblem(*blocked, np.ones(blocked[0].size), 100.0, 50.0)
    assert problem.zp.max() > problem.zl.min()
    coefs = rng.normal(size=problem.n_sources)
    fast = problem.forward(coefs)
    exact = problem.model(coefs, 0.0, None).predict(blocked)  # direct sum
    # Pre-corrected FFT against direct summation (Phillips and White 1997): < 1e-4 relative.
    assert np.linalg.norm(fast - exact) < 1e-4 * np.linalg.norm(exact)
    resid = rng.normal(size=blocked[0].size)
    # double-precision FFTs: the adjoint is the forward's transpose to rounding
    assert abs(fast @ resid - coefs @ problem.adjoint(resid)) < 1e-10 * np.linalg.norm(fast) * np.linalg.norm(
        resid
    )


def test_preconditioner_is_symmetric_positive_and_covers_every_source(draped):
    blocked, _, _, _ = draped
    problem = LatticeProblem(*blocked, np.ones(blocked[0].size), 150.0, 50.0)
    blocks = problem._preconditioner(1e-4)
    counts = np.zeros(problem.n_sources)
    for src in blocks.windows:
        counts[src] += 1
    assert counts.min() >= 1 and counts.max() > 1  # every source, and the windows overlap
    rng = np.random.default_rng(4)
    x, y = rng.normal(size=(2, problem.n_sources))
    mx, my = (blocks.apply(v) for v in (x, y))
    # additive Schwarz sum_i R_i^T A_i^-1 R_i is symmetric positive definite (Smith, Bjorstad
    # and Gropp 1996, Domain Decomposition, ch. 1), as conjugate gradients need
    assert abs(x @ my - y @ mx) < 1e-10 * np.linalg.norm(mx) * np.linalg.norm(y)
    assert x @ mx > 0 and y @ my > 0
    # the packed inverses apply exactly the sum of the windows' local solves (numpy.linalg)
    damped = [normal + 1e-4 * np.eye(src.size) for src, normal in problem._normals]
    direct = np.zeros(problem.n_sources)
    for (src, _), normal in zip(problem._normals, damped):
        direct[src] += np.linalg.solve(normal, x[src])
    assert np.linalg.norm(mx - direct) < 1e-6 * np.linalg.norm(direct)


def test_ceiling_and_points_below_the_layer(draped):
    blocked, bdata, _, _ = draped
    model = eqs.fit_equivalent_sources(
        *blocked, bdata, depth=150.0, damping=1e-3, block_size=CELL, method="fft", ceiling=250.0, maxiter=20
    )
    assert model.points[2].max() <= 250.0
    with pytest.raises(ValueError, match="above the equivalent sources"):
        model._predict_fft(np.array([2000.0]), np.array([2000.0]), np.array([model.points[2].min() - 10.0]))
