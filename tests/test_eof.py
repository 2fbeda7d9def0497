"""Tests of analogs.stages.eof (multivariate EOFs of weighted, balanced anomalies)."""

import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from analogs.stages.eof import MultivariateEOF, area_weights
from analogs.errors import AnalogsInputError, NotFittedError


def _hgt_djf_anomalies():
    """eofs' shipped winter-mean 500 hPa height (65 winters, real reanalysis; no
    units attribute), renamed to canonical names, lat sorted ascending, minus the
    time mean (the anomalies eofs' Eof(center=True) analyses)."""
    from eofs.examples import example_data_path

    with warnings.catch_warnings():
        # the file's reference date "1-1-1" is ambiguous to xarray; harmless here
        warnings.simplefilter("ignore", xr.SerializationWarning)
        with xr.open_dataset(example_data_path("hgt_djf.nc")) as raw:
            z = raw["z"].isel(pressure=0, drop=True).load()
    z = z.rename(latitude="lat", longitude="lon").sortby("lat")
    z = z.assign_coords(lat=z.lat.astype(float), lon=z.lon.astype(float))
    return xr.Dataset({"z500": z - z.mean("time")})


def _synthetic(n_time=120, n_lat=12, n_lon=15, seed=1, decay=0.8, rank=30, nan_box=False):
    """Two fields on one grid with a decaying spectrum (seeded): height-like (gpm)
    and moisture-like (kg kg-1), sharing latent modes, plus small noise."""
    rng = np.random.default_rng(seed)
    lat = np.linspace(25.0, 55.0, n_lat)
    lon = np.linspace(-110.0, -75.0, n_lon)
    amplitudes = decay ** np.arange(rank)
    latent = rng.normal(size=(n_time, rank)) * amplitudes
    space = n_lat * n_lon
    z = latent @ rng.normal(size=(rank, space)) * 60.0 + rng.normal(0, 0.5, (n_time, space))
    q = latent @ rng.normal(size=(rank, space)) * 2e-3 + rng.normal(0, 2e-5, (n_time, space))
    z -= z.mean(axis=0)
    q -= q.mean(axis=0)
    shape = (n_time, n_lat, n_lon)
    q = q.reshape(shape)
    if nan_box:
        q[:, :3, :4] = np.nan  # a "land mask" for the moisture field
    times = pd.date_range("2001-01-01 12:00", periods=n_time, freq="D")
    coords = {"time": times, "lat": lat, "lon": lon}
    return xr.Dataset(
        {"z500": (("time", "lat", "lon"), z.reshape(shape), {"units": "gpm",
                                                              "long_name": "z500 anomaly"}),
         "q850": (("time", "lat", "lon"), q, {"units": "kg kg-1", "long_name": "q850 anomaly"})},
        coords=coords)


def _align_sign(reference, ours):
    """Flip ``ours`` rows to match the sign of ``reference`` rows (EOF sign is arbitrary)."""
    signs = np.sign(np.sum(reference * ours, axis=1))
    return ours * signs[:, None]


@pytest.fixture(scope="module")
def hgt():
    return _hgt_djf_anomalies()


def test_single_field_against_eofs(hgt):
    """eofs.xarray.Eof with weights sqrt(cos lat) (eofs 2.x, Dawson 2016, J. Open
    Res. Softw.) on its shipped hgt_djf.nc. Our single-field balancing divides the
    data by the constant s, so eigenvalues scale by 1/s^2; variance fractions,
    pattern shapes and North errors/eigenvalue ratios do not change."""
    from eofs.xarray import Eof

    z = hgt["z500"]
    weights = np.sqrt(np.clip(np.cos(np.deg2rad(z.lat.values)), 0, None))[:, None]
    reference = Eof(z, weights=weights)
    model = MultivariateEOF(n_modes=10, solver="exact").fit(hgt)
    scale = float(model.field_scales_.sel(field="z500"))

    np.testing.assert_allclose(model.variance_fraction_.values[:5],
                               reference.varianceFraction(neigs=5).values, rtol=1e-8)
    np.testing.assert_allclose(model.eigenvalues_.values * scale ** 2,
                               reference.eigenvalues(neigs=10).values, rtol=1e-8)
    np.testing.assert_allclose(model.north_errors_.values * scale ** 2,
                               reference.northTest(neigs=10).values, rtol=1e-8)
    # eofs' eofs(eofscaling=0) are the unit-norm right singular vectors in the
    # weighted space, like ours; our scaled space differs by the constant 1/s only.
    ref_patterns = reference.eofs(neofs=10).values.reshape(10, -1)
    ours = model.eofs_["z500"].values.reshape(10, -1)
    np.testing.assert_allclose(_align_sign(ref_patterns, ours), ref_patterns, atol=1e-8)
    # pcscaling=0: unscaled PCs U S; ours are in the scaled space, so times s.
    ref_pcs = reference.pcs(npcs=10, pcscaling=0).values.T
    ours_pcs = model.pcs_.values.T * scale
    np.testing.assert_allclose(_align_sign(ref_pcs, ours_pcs), ref_pcs,
                               atol=1e-6 * np.abs(ref_pcs).max())


def test_two_fields_against_sklearn_pca():
    """scikit-learn PCA(svd_solver="full") on our weighted, balanced matrix built by
    hand: same explained_variance_ratio_ (PCA's total counts all components), same
    explained_variance_ and same components up to sign."""
    from sklearn.decomposition import PCA

    ds = _synthetic()
    user = {"z500": 1.0, "q850": 0.5}
    model = MultivariateEOF(n_modes=8, solver="exact", field_weights=user).fit(ds)
    w = area_weights(ds.lat.values)[None, :, None]
    blocks = []
    for name in ("z500", "q850"):
        x = ds[name].values - ds[name].values.mean(axis=0)
        wx = (x * w).reshape(ds.sizes["time"], -1)
        scale = np.sqrt((wx ** 2).sum() / (ds.sizes["time"] - 1))
        np.testing.assert_allclose(float(model.field_scales_.sel(field=name)), scale, rtol=1e-12)
        blocks.append(wx / scale * np.sqrt(user[name]))
    matrix = np.concatenate(blocks, axis=1)
    pca = PCA(svd_solver="full").fit(matrix)
    np.testing.assert_allclose(model.variance_fraction_, pca.explained_variance_ratio_[:8],
                               rtol=1e-9)
    np.testing.assert_allclose(model.eigenvalues_, pca.explained_variance_[:8], rtol=1e-9)
    ours = np.concatenate([model.eofs_[n].values.reshape(8, -1) for n in ("z500", "q850")], axis=1)
    np.testing.assert_allclose(_align_sign(pca.components_[:8], ours), pca.components_[:8],
                               atol=1e-8)
    # Balancing: with equal weights each field carries half the total variance.
    equal = MultivariateEOF(n_modes=1, solver="exact").fit(ds)
    assert equal.total_variance_ == pytest.approx(2.0)


def test_overwrite_scales_float32_anomalies_in_place_with_the_same_fit():
    """fit(overwrite=True) on in-memory float32 anomalies (the build's path) gives the
    fit of overwrite=False, and leaves in the anomalies the weighted, balanced matrix
    built by hand from the published recipe (sqrt(cos lat) weights, Hannachi et al.
    2007); its eigenvalues agree with scikit-learn PCA(svd_solver="full") of that
    float64 matrix to float32 round-off."""
    from sklearn.decomposition import PCA

    ds = _synthetic(n_time=600, n_lat=20, n_lon=30, rank=60).astype("float32")
    kept = MultivariateEOF(n_modes=8, solver="randomized").fit(ds)
    scratch = ds.copy(deep=True)
    model = MultivariateEOF(n_modes=8, solver="randomized").fit(scratch, overwrite=True)
    np.testing.assert_array_equal(model.eigenvalues_, kept.eigenvalues_)
    np.testing.assert_array_equal(model.pcs_, kept.pcs_)
    w = area_weights(ds.lat.values)[None, :, None]
    blocks = []
    for name in ("z500", "q850"):
        x = ds[name].values.astype(np.float64)
        wx = ((x - x.mean(axis=0)) * w).reshape(ds.sizes["time"], -1)
        block = wx / np.sqrt((wx ** 2).sum() / (ds.sizes["time"] - 1))
        np.testing.assert_allclose(scratch[name].values.reshape(block.shape), block,
                                   atol=1e-5 * np.abs(block).max())
        blocks.append(block)
    pca = PCA(svd_solver="full").fit(np.concatenate(blocks, axis=1))
    np.testing.assert_allclose(model.eigenvalues_, pca.explained_variance_[:8], rtol=1e-4)


def test_randomized_agrees_with_exact_on_leading_modes():
    """Halko, Martinsson & Tropp (2011) randomized SVD with power iterations
    recovers the leading modes of a decaying spectrum (eigenvalues within 0.5 %,
    pattern correlations > 0.999)."""
    ds = _synthetic(n_time=300, n_lat=15, n_lon=20, decay=0.75, rank=60)
    exact = MultivariateEOF(n_modes=10, solver="exact").fit(ds)
    randomized = MultivariateEOF(n_modes=10, solver="randomized").fit(ds)
    assert randomized.solver_ == "randomized" and exact.solver_ == "exact"
    np.testing.assert_allclose(randomized.eigenvalues_[:5], exact.eigenvalues_[:5], rtol=5e-3)
    np.testing.assert_allclose(randomized.variance_fraction_[:5], exact.variance_fraction_[:5],
                               rtol=5e-3)
    for name in ("z500", "q850"):
        a = exact.eofs_[name].values.reshape(10, -1)[:5]
        b = randomized.eofs_[name].values.reshape(10, -1)[:5]
        corr = [abs(np.corrcoef(x, y)[0, 1]) for x, y in zip(a, b)]
        assert min(corr) > 0.999


def test_variance_target_selects_smallest_count():
    """Smallest k with cumulative variance fraction >= target (definition)."""
    ds = _synthetic()
    full = MultivariateEOF(n_modes=120, solver="exact").fit(ds)
    cumulative = np.cumsum(full.variance_fraction_.values)
    for target in (0.5, 0.9, 0.99):
        model = MultivariateEOF(variance=target, solver="exact").fit(ds)
        expected = int(np.argmax(cumulative >= target)) + 1
        assert model.n_modes_ == expected and model.n_modes is None
        assert model.variance == target
        assert cumulative[expected - 1] >= target > (cumulative[expected - 2] if expected > 1 else 0)
    randomized = MultivariateEOF(variance=0.9, solver="randomized").fit(ds)
    assert randomized.n_modes_ == int(np.argmax(cumulative >= 0.9)) + 1


def test_fit_transform_reconstruct_and_signs():
    ds = _synthetic(nan_box=True)
    model = MultivariateEOF(n_modes=10, solver="exact")
    pcs = model.fit_transform(ds)
    np.testing.assert_allclose(model.transform(ds), pcs, atol=1e-10)
    # NaN points stay NaN in the patterns and are not used
    assert np.isnan(model.eofs_["q850"].values[:, :3, :4]).all()
    assert np.isfinite(model.eofs_["q850"].values[:, 3:, :]).all()
    # sign convention: largest |loading| positive
    stacked = np.concatenate([np.nan_to_num(model.eofs_[n].values.reshape(10, -1))
                              for n in ("z500", "q850")], axis=1)
    assert (stacked[np.arange(10), np.abs(stacked).argmax(axis=1)] > 0).all()
    # unit norm patterns, and PC distances equal distances in the scaled space
    np.testing.assert_allclose((stacked ** 2).sum(axis=1), 1.0, rtol=1e-10)
    # single time without a time dim
    one = model.transform(ds.isel(time=7))
    assert one.dims == ("mode",)
    np.testing.assert_allclose(one, pcs.isel(time=7), atol=1e-10)
    # all modes reproduce the data (invariant of the SVD)
    everything = MultivariateEOF(n_modes=120, solver="exact").fit(ds)
    back = everything.reconstruct(everything.pcs_)
    for name in ("z500", "q850"):
        np.testing.assert_allclose(back[name].values, ds[name].values, equal_nan=True,
                                   atol=1e-8 * float(np.nanmax(np.abs(ds[name].values))))
    assert np.all(everything.reconstruction_error(ds).values < 1e-8)
    assert np.all(model.reconstruction_error(ds).values > 0)


@pytest.mark.parametrize("solver, chunked, nan_box", [
    ("exact", False, False), ("randomized", False, True), ("randomized", True, True)])
def test_training_error_equals_reconstruction_error(solver, chunked, nan_box):
    """The residuals the fit keeps (||m||^2 - ||m V||^2, no second data pass) equal
    the explicit residual m - m V V^T of every training day, i.e. the docstring formula
    that test_reconstruction_error_matches_definition checks with numpy (Pythagoras
    for an orthogonal projection: common practice, no source)."""
    ds = _synthetic(n_time=700, n_lat=20, n_lon=30, nan_box=nan_box)
    if chunked:
        ds = ds.chunk({"time": 128})
    model = MultivariateEOF(n_modes=8, solver=solver).fit(ds)
    explicit = model.reconstruction_error(ds)
    # The randomized solve is float32 and these residuals are ~1e-5 of each day's
    # energy, so ||m||^2 - ||m V||^2 keeps about 3 digits of them.
    np.testing.assert_allclose(model.training_error_, explicit,
                               rtol=1e-10 if solver == "exact" else 1e-3)
    np.testing.assert_array_equal(model.training_error_["time"], ds["time"])


def test_scales_survive_a_large_mean():
    """Field scales come from sum (x - mean)^2 by shifted sums: a field offset by
    5,500 gpm (raw heights, not anomalies) gets the same scale as its anomalies
    (a naive sum x^2 - N mean^2 would lose most digits). Variance and EOFs do not
    change when a constant is added: common practice, no source."""
    ds = _synthetic()
    raw = ds.assign(z500=ds["z500"] + 5500.0)
    a = MultivariateEOF(n_modes=3, solver="exact").fit(ds)
    b = MultivariateEOF(n_modes=3, solver="exact").fit(raw)
    np.testing.assert_allclose(b.field_scales_, a.field_scales_, rtol=1e-10)
    np.testing.assert_allclose(b.eigenvalues_, a.eigenvalues_, rtol=1e-8)


def test_reconstruction_error_matches_definition():
    """Weighted RMS of the residual (docstring formula) with numpy."""
    ds = _synthetic()
    model = MultivariateEOF(n_modes=3, solver="exact").fit(ds)
    back = model.reconstruct(model.transform(ds))
    w2 = (area_weights(ds.lat.values) ** 2)[None, :, None]
    numerator = sum((((ds[n] - back[n]).values / float(model.field_scales_.sel(field=n))) ** 2
                     * w2).sum(axis=(1, 2)) for n in ("z500", "q850"))
    denominator = 2 * w2.sum() * ds.sizes["lon"]
    np.testing.assert_allclose(model.reconstruction_error(ds), np.sqrt(numerator / denominator),
                               rtol=1e-8)


def test_netcdf_round_trip(tmp_path):
    ds = _synthetic(nan_box=True)
    model = MultivariateEOF(n_modes=6, solver="exact", field_weights={"q850": 0.5}).fit(ds)
    path = tmp_path / "basis.nc"
    model.to_dataset().to_netcdf(path)
    with xr.open_dataset(path) as stored:
        rebuilt = MultivariateEOF.from_dataset(stored.load())
    assert rebuilt.get_params() == model.get_params()
    np.testing.assert_array_equal(rebuilt.transform(ds).values, model.transform(ds).values)
    xr.testing.assert_identical(rebuilt.eigenvalues_, model.eigenvalues_)
    xr.testing.assert_identical(rebuilt.variance_fraction_, model.variance_fraction_)
    xr.testing.assert_identical(rebuilt.field_scales_, model.field_scales_)
    with pytest.raises(NotFittedError, match="without the training PCs"):
        rebuilt.pcs_


def test_dask_input_matches_numpy():
    """Dask-backed anomalies (chunked in time) give the same EOFs, eigenvalues and
    PCs as numpy input, with dask's svd_compressed for the randomized solver."""
    ds = _synthetic(n_time=200, nan_box=True)
    lazy = ds.chunk({"time": 50})
    for solver, tol in (("exact", 1e-10), ("randomized", 1e-6)):
        eager = MultivariateEOF(n_modes=5, solver=solver).fit(ds)
        chunked = MultivariateEOF(n_modes=5, solver=solver).fit(lazy)
        assert chunked.solver_ == solver
        np.testing.assert_allclose(chunked.eigenvalues_, eager.eigenvalues_, rtol=tol)
        for name in ("z500", "q850"):
            np.testing.assert_allclose(chunked.eofs_[name], eager.eofs_[name], atol=tol,
                                       equal_nan=True)
        projected = chunked.transform(lazy)
        assert projected.chunks is not None
        np.testing.assert_allclose(projected.compute(), eager.pcs_, atol=tol * 1e2)


def test_getters_return_copies():
    ds = _synthetic()
    model = MultivariateEOF(n_modes=3, solver="exact").fit(ds)
    model.eofs_["z500"].values[:] = 0.0
    model.eigenvalues_.values[:] = 0.0
    assert float(np.abs(model.eofs_["z500"]).max()) > 0
    assert float(model.eigenvalues_.min()) > 0


def test_auto_solver_choice_is_recorded():
    ds = _synthetic()
    model = MultivariateEOF(n_modes=3).fit(ds)
    assert model.solver == "auto" and model.solver_ == "exact"


@pytest.mark.parametrize("kwargs, message", [
    ({"n_modes": 0}, r"The 'n_modes' parameter of MultivariateEOF must be an integer >= 1\. "
                     r"Got 0 instead\."),
    ({"variance": 1.5}, r"The 'variance' parameter of MultivariateEOF must be a number > 0.0 "
                        r"and <= 1.0\. Got 1.5 instead\."),
    ({"n_modes": 3, "variance": 0.9}, r"'n_modes' and 'variance' parameters of MultivariateEOF "
                                      r"exclude each other"),
    ({"solver": "fast"}, r"The 'solver' parameter of MultivariateEOF must be one of 'auto', "
                         r"'exact', 'randomized'\. Got 'fast' instead\."),
    ({"field_weights": {"q850": -1}}, r"'field_weights' parameter of MultivariateEOF must map"),
    ({"field_weights": {"t850": 1.0}}, r"names 't850', which is not among the fields"),
])
def test_bad_parameters(kwargs, message):
    with pytest.raises(AnalogsInputError, match=message):
        MultivariateEOF(**kwargs).fit(_synthetic(n_time=20))


def test_bad_inputs_to_transform():
    ds = _synthetic(n_time=30)
    model = MultivariateEOF(n_modes=3).fit(ds)
    with pytest.raises(NotFittedError, match="not fitted yet"):
        MultivariateEOF().transform(ds)
    with pytest.raises(AnalogsInputError, match="Field 'q850' is missing from the anomalies"):
        model.transform(ds[["z500"]])
    coarse = ds.isel(lat=slice(0, None, 2))
    with pytest.raises(AnalogsInputError, match=r"The lat grid of field 'z500' \(6 points"):
        model.transform(coarse)
    holed = ds.copy(deep=True)
    holed["z500"][:, 0, 0] = np.nan
    with pytest.raises(AnalogsInputError, match="'z500' has 30 missing values"):
        model.transform(holed)
