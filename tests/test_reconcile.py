"""Reconciliation: published worked example, dense and statsmodels oracles, Gross & Sohl by hand, properties."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import sparse
from statsmodels.regression.linear_model import GLS

from consensus.errors import InvalidSpec
from consensus.methods.reconcile import (DEFAULT_LEVELS, METHODS, is_coherent, reconcile, shrinkage_intensity,
                                         summing_matrix)

TWO_SERIES = sparse.csr_matrix(np.array([[1.0, 1.0], [1.0, 0.0], [0.0, 1.0]]))  # Total = A + B


def make_hierarchy(n_families=3, items_per_family=3, n_regions=2, locations_per_region=2, seed=0):
    """An invented hierarchy: families F0…, items F0-I0…, regions R0…, locations R0-L0…; every pair stocked."""
    items = pd.DataFrame({"item": [f"F{f}-I{i}" for f in range(n_families) for i in range(items_per_family)],
                          "family": [f"F{f}" for f in range(n_families) for _ in range(items_per_family)]})
    locations = pd.DataFrame({"location": [f"R{r}-L{j}" for r in range(n_regions) for j in range(locations_per_region)],
                              "region": [f"R{r}" for r in range(n_regions) for _ in range(locations_per_region)]})
    bottom = items[["item"]].merge(locations[["location"]], how="cross")
    bottom = bottom.sample(frac=1.0, random_state=seed).reset_index(drop=True)  # S must follow bottom's order
    return bottom, items, locations


def dense_reconcile(S, base, W):
    """ỹ = S (S′W⁻¹S)⁻¹ S′W⁻¹ ŷ with dense numpy (Wickramasuriya, Athanasopoulos & Hyndman, 2019, eq. 9)."""
    S = S.toarray()
    Winv = np.linalg.inv(W)
    G = np.linalg.solve(S.T @ Winv @ S, S.T @ Winv)
    return S @ G @ base


def dense_shrunk_covariance(residuals):
    """Schäfer & Strimmer (2005) shrinkage to the diagonal, written out entry by entry, as in the R package
    hts (shrink.estim) used by Wickramasuriya et al. (2019); from memory of that code.  residuals: n × T."""
    x = residuals.T  # T × n, taken as mean zero
    T = x.shape[0]
    covm = x.T @ x / T
    sd = np.sqrt(np.diag(covm))
    corm = covm / np.outer(sd, sd)
    xs = x / sd
    v = (1.0 / (T * (T - 1))) * ((xs ** 2).T @ (xs ** 2) - (1.0 / T) * (xs.T @ xs) ** 2)
    np.fill_diagonal(v, 0.0)
    d = corm.copy()
    np.fill_diagonal(d, 0.0)
    lam = min(max(v.sum() / (d ** 2).sum(), 0.0), 1.0)
    return lam, lam * np.diag(np.diag(covm)) + (1 - lam) * covm


# --- published worked example -------------------------------------------------------------------------

def test_two_series_ols_matches_worked_example():
    # Total = A + B, ŷ = (100, 55, 40); OLS gives (98.33, 56.67, 41.67) from ỹ = S(S′S)⁻¹S′ŷ
    # (Wickramasuriya, Athanasopoulos & Hyndman, 2019, with W = I).
    out = reconcile(np.array([100.0, 55.0, 40.0]), TWO_SERIES, method="ols")
    np.testing.assert_allclose(out, [98.33, 56.67, 41.67], atol=0.005)


def test_two_series_wls_matches_worked_example():
    # Same hierarchy with W = diag(25, 9, 4): ỹ = (96.71, 56.18, 40.53) (same formula and source).
    out = reconcile(np.array([100.0, 55.0, 40.0]), TWO_SERIES, method="wls_var", weights=[25.0, 9.0, 4.0])
    np.testing.assert_allclose(out, [96.71, 56.18, 40.53], atol=0.005)


# --- dense and statsmodels oracles on a larger hierarchy ----------------------------------------------

@pytest.fixture(scope="module")
def larger():
    bottom, items, locations = make_hierarchy(n_families=3, items_per_family=4, n_regions=2, locations_per_region=3)
    S, nodes = summing_matrix(bottom, items=items, locations=locations)
    rng = np.random.default_rng(42)
    n_nodes, n_bottom = S.shape
    truth = S @ rng.gamma(4.0, 25.0, size=(n_bottom, 5))
    base = truth * rng.normal(1.0, 0.15, size=truth.shape)  # incoherent base forecasts
    residuals = rng.normal(size=(n_nodes, 30)) * np.sqrt(np.asarray(S.sum(axis=1))) * 3.0
    return S, base, residuals


@pytest.mark.parametrize("method", ["ols", "wls_struct", "wls_var", "mint_shrink"])
def test_linear_methods_match_dense_solve(larger, method):
    S, base, residuals = larger
    n_nodes = S.shape[0]
    if method == "ols":
        W = np.eye(n_nodes)
    elif method == "wls_struct":
        W = np.diag(np.asarray(S.sum(axis=1)).ravel())
    elif method == "wls_var":
        W = np.diag((residuals ** 2).mean(axis=1))
    else:
        W = dense_shrunk_covariance(residuals)[1]
    expected = dense_reconcile(S, base, W)
    got = reconcile(base, S, method=method, residuals=residuals, nonnegative=False)
    np.testing.assert_allclose(got, expected, rtol=1e-7, atol=1e-7)


@pytest.mark.parametrize("method", ["ols", "wls_var", "mint_shrink"])
def test_bottom_level_equals_statsmodels_gls(larger, method):
    # The reconciled bottom is the GLS estimate of regressing ŷ on S with error covariance W
    # (Wickramasuriya et al., 2019, sec. 2); statsmodels' GLS is the reference implementation.
    S, base, residuals = larger
    n_nodes, n_bottom = S.shape
    W = {"ols": np.eye(n_nodes), "wls_var": np.diag((residuals ** 2).mean(axis=1)),
         "mint_shrink": dense_shrunk_covariance(residuals)[1]}[method]
    got = reconcile(base, S, method=method, residuals=residuals, nonnegative=False)
    for period in (0, base.shape[1] - 1):  # two periods suffice: each statsmodels fit factors W afresh
        params = GLS(base[:, period], S.toarray(), sigma=W).fit().params
        np.testing.assert_allclose(got[-n_bottom:, period], params, rtol=1e-6, atol=1e-6)


def test_shrinkage_intensity_matches_dense_formula():
    # λ from the O(nT²) rewrite equals the entry-by-entry Schäfer–Strimmer sum (2005, target D).
    rng = np.random.default_rng(7)
    common = rng.normal(size=(1, 15))
    residuals = rng.normal(size=(9, 15)) + 0.8 * common  # correlated, so 0 < λ < 1
    lam_dense, _ = dense_shrunk_covariance(residuals)
    assert 0.0 < lam_dense < 1.0
    assert shrinkage_intensity(residuals) == pytest.approx(lam_dense, rel=1e-10)


def test_shrinkage_intensity_is_one_for_nearly_uncorrelated_noise():
    # With T small against the spread of sample correlations of independent series, the
    # estimated λ is clipped at 1 (Schäfer & Strimmer, 2005: λ* = 1 means "use the target").
    rng = np.random.default_rng(3)
    residuals = rng.normal(size=(40, 6))
    lam_dense, _ = dense_shrunk_covariance(residuals)
    assert shrinkage_intensity(residuals) == pytest.approx(lam_dense, rel=1e-10)


# --- Gross & Sohl (1990) top-down on a hand-checked table --------------------------------------------

def test_top_down_gross_sohl_variants_by_hand():
    # History: A = (1, 6), B = (3, 2), totals (4, 8).
    # Average of historical proportions: A (1/4 + 6/8)/2 = 0.5, B (3/4 + 2/8)/2 = 0.5.
    # Proportion of historical averages: A 3.5/6 = 0.58333, B 2.5/6 = 0.41667.
    # Total forecast 120 → (60, 60) and (70, 50).  Hand arithmetic, Gross & Sohl (1990) methods A and F.
    history = np.array([[4.0, 8.0], [1.0, 6.0], [3.0, 2.0]])
    base = np.array([120.0, 10.0, 10.0])
    hist_avg = reconcile(base, TWO_SERIES, method="top_down_hist_avg", history=history)
    prop_avg = reconcile(base, TWO_SERIES, method="top_down_prop_avg", history=history[1:])
    np.testing.assert_allclose(hist_avg, [120.0, 60.0, 60.0])
    np.testing.assert_allclose(prop_avg, [120.0, 70.0, 50.0])


def test_top_down_needs_history():
    with pytest.raises(InvalidSpec):
        reconcile(np.array([1.0, 1.0, 1.0]), TWO_SERIES, method="top_down_prop_avg")


# --- summing matrix ------------------------------------------------------------------------------------

def test_summing_matrix_shape_labels_and_identity_tail():
    bottom, items, locations = make_hierarchy(n_families=2, items_per_family=3, n_regions=2, locations_per_region=2)
    S, nodes = summing_matrix(bottom, items=items, locations=locations)
    # Node counts by level: 1 + 2 regions + 4 locations + 2 families + 4 family×region + 8 family×location
    # + 6 items + 12 item×region + 24 bottom = 63 (hand count of the crossed hierarchy).
    assert S.shape == (63, 24)
    assert (S[-24:] != sparse.identity(24)).nnz == 0
    assert list(nodes.columns) == ["level", "family", "region", "item", "location"]
    assert nodes["level"].iloc[0] == "all×all"
    assert S[0].sum() == 24
    tail = nodes.iloc[-24:].reset_index(drop=True)
    pd.testing.assert_frame_equal(tail[["item", "location"]], bottom.astype(object), check_dtype=False)
    fam_region = nodes.index[(nodes["level"] == "family×region") & (nodes["family"] == "F1") & (nodes["region"] == "R0")]
    members = bottom.index[bottom["item"].str.startswith("F1") & bottom["location"].str.startswith("R0")]
    np.testing.assert_array_equal(np.flatnonzero(S[fam_region[0]].toarray()), np.sort(members))
    assert nodes.loc[0, "family"] is None and nodes.loc[0, "location"] is None


def test_summing_matrix_rejects_unknown_level_and_reconcile_unknown_method():
    bottom, items, locations = make_hierarchy()
    with pytest.raises(InvalidSpec):
        summing_matrix(bottom, items=items, locations=locations, levels=[("family", "city")])
    S, _ = summing_matrix(bottom, items=items, locations=locations, levels=[("all", "all")])
    assert S.shape == (1 + len(bottom), len(bottom))
    with pytest.raises(InvalidSpec):
        reconcile(np.ones(S.shape[0]), S, method="average")
    with pytest.raises(InvalidSpec):
        reconcile(np.ones(S.shape[0]), S, method="mint_shrink")


def test_negative_bottom_is_clipped_and_rebuilt_coherently():
    # OLS of (10, 20, −15) gives B = −8.33…; clipped to 0 and summed up again.
    out = reconcile(np.array([10.0, 20.0, -15.0]), TWO_SERIES, method="ols")
    assert out[2] == 0.0
    assert out[0] == pytest.approx(out[1])
    assert is_coherent(out, TWO_SERIES)


def test_is_coherent_detects_a_broken_total():
    assert is_coherent(np.array([95.0, 55.0, 40.0]), TWO_SERIES)
    assert not is_coherent(np.array([96.0, 55.0, 40.0]), TWO_SERIES)


# --- properties ----------------------------------------------------------------------------------------

hierarchy_shapes = st.tuples(st.integers(1, 3), st.integers(1, 3), st.integers(1, 2), st.integers(1, 3),
                             st.integers(0, 10_000))


@settings(max_examples=25, deadline=None)
@given(shape=hierarchy_shapes, method=st.sampled_from(METHODS), nonnegative=st.booleans())
def test_every_method_returns_coherent_forecasts(shape, method, nonnegative):
    # Coherence ỹ = S·ỹ_bottom is the defining property of reconciliation (Wickramasuriya et al., 2019).
    n_f, n_i, n_r, n_l, seed = shape
    bottom, items, locations = make_hierarchy(n_f, n_i, n_r, n_l, seed=seed)
    S, _ = summing_matrix(bottom, items=items, locations=locations)
    rng = np.random.default_rng(seed)
    n_nodes, n_bottom = S.shape
    base = rng.normal(50.0, 30.0, size=(n_nodes, 3))
    residuals = rng.normal(size=(n_nodes, 12))
    history = rng.gamma(2.0, 10.0, size=(n_bottom, 6))
    out = reconcile(base, S, method=method, residuals=residuals, history=history, nonnegative=nonnegative)
    assert out.shape == base.shape
    assert is_coherent(out, S, atol=1e-6)
    if nonnegative:
        assert (out >= 0).all()


@settings(max_examples=25, deadline=None)
@given(shape=hierarchy_shapes)
def test_bottom_up_leaves_bottom_unchanged(shape):
    n_f, n_i, n_r, n_l, seed = shape
    bottom, items, locations = make_hierarchy(n_f, n_i, n_r, n_l, seed=seed)
    S, _ = summing_matrix(bottom, items=items, locations=locations)
    base = np.random.default_rng(seed).gamma(2.0, 10.0, size=(S.shape[0], 4))
    out = reconcile(base, S, method="bottom_up")
    np.testing.assert_array_equal(out[-S.shape[1]:], base[-S.shape[1]:])


@settings(max_examples=15, deadline=None)
@given(shape=hierarchy_shapes, method=st.sampled_from(["ols", "wls_struct", "wls_var", "mint_shrink"]))
def test_coherent_base_forecasts_are_left_alone(shape, method):
    # SG is a projection onto the coherent subspace, so coherent ŷ is unchanged (Wickramasuriya et al., 2019).
    n_f, n_i, n_r, n_l, seed = shape
    bottom, items, locations = make_hierarchy(n_f, n_i, n_r, n_l, seed=seed)
    S, _ = summing_matrix(bottom, items=items, locations=locations)
    rng = np.random.default_rng(seed)
    base = S @ rng.gamma(2.0, 10.0, size=(S.shape[1], 2))
    out = reconcile(base, S, method=method, residuals=rng.normal(size=(S.shape[0], 10)), nonnegative=False)
    np.testing.assert_allclose(out, base, rtol=1e-7, atol=1e-7)
