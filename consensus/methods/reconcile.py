"""Hierarchical reconciliation: make forecasts add up at every level.

The hierarchy crosses two trees over the bottom series (item × location):
item → family → all and location → region → all.  Each node is a pair of
levels, e.g. family × region; its value is the sum of the bottom series below
it, y = S b with S the summing matrix (nodes × bottom, 0/1).

Linear reconciliation maps base forecasts ŷ (one per node) to coherent ones
ỹ = S G ŷ.  The MinT family (Wickramasuriya, Athanasopoulos & Hyndman, 2019,
JASA 114:804–819) takes

    G = (S′W⁻¹S)⁻¹ S′W⁻¹,

the generalised-least-squares projection under error covariance W:
W = I (OLS), W = diag(S·1) (structural WLS), W = diag of residual variances
(variance WLS), or W = λ·diag(Σ̂) + (1−λ)·Σ̂ with Schäfer & Strimmer's (2005)
shrinkage intensity λ (MinT shrink).  Bottom-up takes G = [0 | I]; top-down
splits the total by historical proportions (Gross & Sohl, 1990).

How it scales, and what is exact.  With 20,000 bottom series neither the
nodes × nodes W nor the bottom × bottom S′W⁻¹S may be formed (the total node
makes the latter dense).  Instead:

* W⁻¹ is applied, never formed.  Diagonal W is a division.  The shrunk
  covariance is diagonal plus low rank: Σ̂ = UU′ with U = Eᵀ/√T (E the nodes ×
  T residual matrix, T ≪ n), so W = A + VV′ with A = λ·diag(Σ̂), V = √(1−λ)·U,
  and the Woodbury identity gives W⁻¹x = A⁻¹x − A⁻¹V (I + V′A⁻¹V)⁻¹ V′A⁻¹x
  exactly, with only a T × T solve.
* λ is exact: the sums over i ≠ j in Schäfer & Strimmer's formula are
  rewritten through T × T Gram matrices (see :func:`shrinkage_intensity`).
* The normal equations (S′W⁻¹S) b = S′W⁻¹ŷ are solved by conjugate gradients
  (Hestenes & Stiefel, 1952) with a Jacobi preconditioner, one system per
  period, all periods at once.  This is the only approximation: the relative
  residual is driven below ``tolerance`` (1e-10 by default), which leaves the
  result equal to the direct solve to many more digits than a plan needs.
  Coherence is exact regardless, since the output is S times a bottom vector.
* Zero residual variances would make W singular; they are floored at 1e-9 of
  the mean variance (such a node is then treated as nearly certain).

Nonnegativity: negative bottom values are clipped to 0 and the hierarchy
rebuilt bottom-up from the clipped bottom, so the output stays coherent.  This
is a pragmatic heuristic, not the constrained optimum of Wickramasuriya,
Athanasopoulos & Hyndman (2020).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
import pandas as pd
from scipy import linalg, sparse

from consensus.errors import InvalidSpec

ITEM_LEVELS = ("all", "family", "item")
LOCATION_LEVELS = ("all", "region", "location")
BOTTOM_LEVEL = ("item", "location")
#: Every node level, coarsest first; the bottom level comes last so S ends in the identity.
DEFAULT_LEVELS: tuple[tuple[str, str], ...] = tuple((i, l) for i in ITEM_LEVELS for l in LOCATION_LEVELS)
METHODS = ("bottom_up", "top_down_hist_avg", "top_down_prop_avg", "ols", "wls_struct", "wls_var", "mint_shrink")
NODE_COLUMNS = ["level", "family", "region", "item", "location"]

_VARIANCE_FLOOR = 1e-9
_LAMBDA_FLOOR = 1e-8


def summing_matrix(bottom: pd.DataFrame, *, items: pd.DataFrame, locations: pd.DataFrame,
                   levels: Sequence[tuple[str, str]] = DEFAULT_LEVELS) -> tuple[sparse.csr_matrix, pd.DataFrame]:
    """The summing matrix S (nodes × bottom, CSR) of the item × location hierarchy, and its node labels.

    ``bottom`` lists the bottom series [item, location] in the column order of
    S.  ``levels`` are (item level, location level) pairs with item level in
    all/family/item and location level in all/region/location; the bottom
    level (item, location) is always included, last, in ``bottom``'s order, so
    the last len(bottom) rows of S are the identity.  Labels are [level,
    family, region, item, location], with the keys a node does not have left
    empty; item and location nodes also carry their family or region.
    """
    chosen = []
    for level in levels:
        level = tuple(level)
        if len(level) != 2 or level[0] not in ITEM_LEVELS or level[1] not in LOCATION_LEVELS:
            raise InvalidSpec(f"hierarchy level {level!r} is not one of {DEFAULT_LEVELS}")
        if level != BOTTOM_LEVEL and level not in chosen:
            chosen.append(level)
    chosen.append(BOTTOM_LEVEL)
    keys = bottom[["item", "location"]].astype(object).reset_index(drop=True)
    if keys.duplicated().any():
        raise ValueError("bottom series repeat an item × location pair")
    keys["family"] = keys["item"].map(items.drop_duplicates("item").set_index("item")["family"]).astype(object)
    keys["region"] = keys["location"].map(
        locations.drop_duplicates("location").set_index("location")["region"]).astype(object)
    for column, what in (("family", "items"), ("region", "locations")):
        if keys[column].isna().any():
            raise ValueError(f"bottom series not in the {what} master: "
                             f"{keys.loc[keys[column].isna(), ['item', 'location']].head(5).to_dict('records')}")
    n_bottom = len(keys)
    columns = np.arange(n_bottom)
    row_blocks, col_blocks, label_blocks = [], [], []
    offset = 0
    for item_level, location_level in chosen:
        key_columns = _node_key_columns(item_level, location_level)
        if (item_level, location_level) == BOTTOM_LEVEL:
            codes = columns
            labels = keys[key_columns].copy()
        elif key_columns:
            index = pd.MultiIndex.from_frame(keys[key_columns])
            uniques = index.unique().sort_values()
            codes = uniques.get_indexer(index)
            labels = uniques.to_frame(index=False)
        else:
            codes = np.zeros(n_bottom, dtype=int)
            labels = pd.DataFrame(index=[0])
        labels = labels.reindex(columns=NODE_COLUMNS[1:]).astype(object)
        labels.insert(0, "level", f"{item_level}×{location_level}")
        row_blocks.append(codes + offset)
        col_blocks.append(columns)
        label_blocks.append(labels)
        offset += len(labels)
    rows = np.concatenate(row_blocks)
    S = sparse.csr_matrix((np.ones(len(rows)), (rows, np.concatenate(col_blocks))), shape=(offset, n_bottom))
    nodes = pd.concat(label_blocks, ignore_index=True)
    nodes = nodes.astype(object).where(nodes.notna(), None)
    return S, nodes


def _node_key_columns(item_level: str, location_level: str) -> list[str]:
    item_keys = {"all": [], "family": ["family"], "item": ["family", "item"]}[item_level]
    location_keys = {"all": [], "region": ["region"], "location": ["region", "location"]}[location_level]
    return item_keys + location_keys


def is_coherent(full: np.ndarray, S: sparse.spmatrix, *, atol: float = 1e-6) -> bool:
    """True when every node equals the sum of its bottom series: |ỹ − S·ỹ_bottom| ≤ atol (+ 1e-9·|ỹ|)."""
    full = np.asarray(full, dtype=float)
    S = sparse.csr_matrix(S)
    n_bottom = S.shape[1]
    if full.shape[0] != S.shape[0]:
        raise ValueError(f"full has {full.shape[0]} rows, S has {S.shape[0]} nodes")
    rebuilt = S @ full[-n_bottom:]
    return bool(np.all(np.abs(full - rebuilt) <= atol + 1e-9 * np.abs(rebuilt)))


def _check_bottom_identity(S: sparse.csr_matrix) -> None:
    n_bottom = S.shape[1]
    tail = S[-n_bottom:]
    if (tail - sparse.identity(n_bottom, format="csr")).count_nonzero():
        raise ValueError("S must end with the identity over the bottom series (as summing_matrix builds it)")


def _top_row(S: sparse.csr_matrix) -> int:
    full_rows = np.flatnonzero(np.diff(S.indptr) == S.shape[1])
    if not len(full_rows):
        raise InvalidSpec("top-down needs a total node (a row of S summing every bottom series)")
    return int(full_rows[0])


def shrinkage_intensity(residuals: np.ndarray) -> float:
    """Schäfer–Strimmer shrinkage intensity λ of the residual covariance towards its diagonal.

    With x the n × T residuals taken as mean zero (as for one-step forecast
    errors), Σ̂ = x xᵀ / T, standardised z = x / √diag(Σ̂), sample
    correlations r_ij = Σ_t z_it z_jt / T and
    Var(r_ij) ≈ [Σ_t z²_it z²_jt − (Σ_t z_it z_jt)² / T] / (T(T − 1)),

        λ = Σ_{i≠j} Var(r_ij) / Σ_{i≠j} r²_ij,   clipped to [0, 1]

    (Schäfer & Strimmer, 2005, Stat. Appl. Genet. Mol. Biol. 4(1):32, target
    D; as used for MinT by Wickramasuriya et al., 2019).  The sums over all
    i ≠ j are taken through T × T matrices, so the cost is O(n T²):
    Σ_ij Σ_t z²_it z²_jt = Σ_t (Σ_i z²_it)², Σ_ij (Σ_t z_it z_jt)² = ‖z′z‖²_F over
    the T × T Gram matrix z′z, minus the i = j terms.
    """
    x = np.asarray(residuals, dtype=float)
    n, T = x.shape
    if T < 2:
        raise InvalidSpec("MinT shrinkage needs residuals over at least 2 periods")
    variance = (x * x).sum(axis=1) / T
    scale = np.sqrt(variance)
    z = np.divide(x, scale[:, None], out=np.zeros_like(x), where=scale[:, None] > 0)
    z2 = z * z
    gram = z.T @ z                              # T × T: Σ_i z_it z_iu
    sum_zz_sq_all = float(np.sum(gram * gram))  # Σ_ij (Σ_t z_it z_jt)² = ‖z′z‖²_F
    per_series = z2.sum(axis=1)                 # Σ_t z²_it (= T for a non-constant series)
    sum_zz_sq_diag = float(np.sum(per_series ** 2))
    per_period = z2.sum(axis=0)                 # Σ_i z²_it
    sum_z2z2_all = float(per_period @ per_period)  # Σ_ij Σ_t z²_it z²_jt = Σ_t (Σ_i z²_it)²
    sum_z2z2_diag = float(np.sum(z2 * z2))
    variance_sum = ((sum_z2z2_all - sum_z2z2_diag) - (sum_zz_sq_all - sum_zz_sq_diag) / T) / (T * (T - 1))
    correlation_sum = (sum_zz_sq_all - sum_zz_sq_diag) / T ** 2
    if correlation_sum <= 0:
        return 1.0
    return float(min(max(variance_sum / correlation_sum, 0.0), 1.0))


def _floored(variance: np.ndarray) -> np.ndarray:
    variance = np.asarray(variance, dtype=float)
    positive = variance[variance > 0]
    floor = _VARIANCE_FLOOR * (positive.mean() if len(positive) else 1.0)
    return np.maximum(variance, floor)


def _inverse_covariance(method: str, S: sparse.csr_matrix, *, residuals, weights):
    """W⁻¹ as (apply function, its diagonal part, low-rank factor or None) for the chosen method."""
    n_nodes = S.shape[0]
    if method == "ols":
        inv_diag = np.ones(n_nodes)
    elif method == "wls_struct":
        inv_diag = 1.0 / np.asarray(S.sum(axis=1)).ravel()
    elif method == "wls_var":
        if weights is not None:
            variance = np.asarray(weights, dtype=float).ravel()
        elif residuals is not None:
            variance = _residual_matrix(residuals, n_nodes).__pow__(2).mean(axis=1)
        else:
            raise InvalidSpec("wls_var needs residuals or weights (error variances per node)")
        if variance.shape != (n_nodes,) or np.any(variance < 0) or not np.all(np.isfinite(variance)):
            raise ValueError("wls_var weights must be one finite, nonnegative variance per node")
        inv_diag = 1.0 / _floored(variance)
    else:  # mint_shrink
        if residuals is None:
            raise InvalidSpec("mint_shrink needs in-sample residuals (nodes × periods)")
        x = _residual_matrix(residuals, n_nodes)
        T = x.shape[1]
        lam = max(shrinkage_intensity(x), _LAMBDA_FLOOR)  # λ = 0 would leave W of rank T < n
        variance = _floored((x * x).mean(axis=1))
        inv_diag = 1.0 / (lam * variance)
        low_rank = x * np.sqrt((1.0 - lam) / T)       # V, n × T: W = diag(λσ²) + V Vᵀ
        scaled = low_rank * inv_diag[:, None]          # A⁻¹V
        core = np.eye(T) + low_rank.T @ scaled         # I + VᵀA⁻¹V
        core_factor = linalg.cho_factor(core)

        def apply(y: np.ndarray) -> np.ndarray:
            return inv_diag[:, None] * y - scaled @ linalg.cho_solve(core_factor, scaled.T @ y)

        return apply, inv_diag, (scaled, core_factor)

    def apply_diagonal(y: np.ndarray) -> np.ndarray:
        return inv_diag[:, None] * y

    return apply_diagonal, inv_diag, None


def _residual_matrix(residuals, n_nodes: int) -> np.ndarray:
    x = np.asarray(residuals, dtype=float)
    if x.ndim != 2 or x.shape[0] != n_nodes:
        raise ValueError(f"residuals must be nodes × periods ({n_nodes} rows), got shape {x.shape}")
    if not np.all(np.isfinite(x)):
        raise ValueError("residuals must be finite")
    return x


def _solve_normal_equations(S: sparse.csr_matrix, apply_w_inverse: Callable, inv_diag: np.ndarray, low_rank,
                            rhs: np.ndarray, start: np.ndarray, *, tolerance: float, max_iterations: int) -> np.ndarray:
    """Solve (S′W⁻¹S) B = R column by column with Jacobi-preconditioned conjugate gradients, all columns at once."""
    St = S.T.tocsr()

    def operator(b: np.ndarray) -> np.ndarray:
        return St @ apply_w_inverse(S @ b)

    # diag(S′W⁻¹S) = S′·diag(A⁻¹) − diag of the Woodbury term, both cheap.
    preconditioner = St @ inv_diag
    if low_rank is not None:
        scaled, core_factor = low_rank
        projected = St @ scaled                     # S′A⁻¹V, bottom × T
        preconditioner = preconditioner - np.einsum("ij,ij->i", projected,
                                                    linalg.cho_solve(core_factor, projected.T).T)
    preconditioner = 1.0 / np.maximum(preconditioner, 1e-300)
    x = start.copy()
    residual = rhs - operator(x)
    target = tolerance * np.maximum(np.linalg.norm(rhs, axis=0), 1e-300)
    z = preconditioner[:, None] * residual
    direction = z.copy()
    rz = np.einsum("ij,ij->j", residual, z)
    for _ in range(max_iterations):
        active = np.linalg.norm(residual, axis=0) > target
        if not active.any():
            return x
        product = operator(direction)
        curvature = np.einsum("ij,ij->j", direction, product)
        alpha = np.where(active & (curvature > 0), rz / np.where(curvature > 0, curvature, 1.0), 0.0)
        x += alpha * direction
        residual -= alpha * product
        z = preconditioner[:, None] * residual
        rz_new = np.einsum("ij,ij->j", residual, z)
        beta = np.where(active & (rz > 0), rz_new / np.where(rz > 0, rz, 1.0), 0.0)
        direction = z + beta * direction
        rz = rz_new
    if (np.linalg.norm(residual, axis=0) > target).any():
        raise ArithmeticError(f"reconciliation did not converge in {max_iterations} iterations; "
                              "check for near-zero error variances")
    return x


def _historical_proportions(history: np.ndarray, n_nodes: int, n_bottom: int, *, method: str) -> np.ndarray:
    """Gross & Sohl (1990) disaggregation proportions of each bottom series in the total."""
    h = np.asarray(history, dtype=float)
    if h.ndim != 2 or h.shape[0] not in (n_nodes, n_bottom):
        raise ValueError(f"history must be nodes × periods or bottom × periods, got shape {h.shape}")
    bottom = h[-n_bottom:]
    # The total is taken as the sum of the bottom history so that proportions add to one.
    total = bottom.sum(axis=0)
    if method == "top_down_hist_avg":
        usable = total != 0
        if not usable.any():
            raise ValueError("history has no period with a nonzero total")
        return (bottom[:, usable] / total[usable]).mean(axis=1)
    total_mean = total.mean()
    if total_mean == 0:
        raise ValueError("history has a zero average total")
    return bottom.mean(axis=1) / total_mean


def reconcile(base: np.ndarray, S: sparse.spmatrix, *, method: str, residuals: np.ndarray | None = None,
              weights: np.ndarray | None = None, history: np.ndarray | None = None, nonnegative: bool = True,
              tolerance: float = 1e-10, max_iterations: int = 2000) -> np.ndarray:
    """Coherent forecasts for every node from base forecasts, ỹ = S·G·ŷ.

    ``base`` is nodes × periods (or one vector), rows in the order of S.
    ``method`` is one of :data:`METHODS`:

    * ``bottom_up``: G = [0 | I], the bottom base forecasts summed up.
    * ``top_down_hist_avg``: bottom j gets p_j·ŷ_total with the average of
      historical proportions p_j = (1/T) Σ_t y_j,t / Y_t (Gross & Sohl, 1990,
      method A); ``history`` (nodes or bottom × T) required.
    * ``top_down_prop_avg``: proportion of historical averages
      p_j = (Σ_t y_j,t / T) / (Σ_t Y_t / T) (Gross & Sohl, 1990, method F).
    * ``ols``, ``wls_struct``, ``wls_var``, ``mint_shrink``:
      G = (S′W⁻¹S)⁻¹S′W⁻¹ with W = I, diag(S·1), diag(σ̂²) (from ``weights`` as
      variances or from ``residuals``), or λ·diag(Σ̂) + (1−λ)·Σ̂ from
      ``residuals`` (nodes × T in-sample one-step errors), Wickramasuriya,
      Athanasopoulos & Hyndman (2019).

    With ``nonnegative`` negative bottom values are set to 0 and the nodes
    rebuilt bottom-up.  Returns the coherent nodes × periods array.
    """
    if method not in METHODS:
        raise InvalidSpec(f"reconciliation method {method!r} is not one of {METHODS}")
    S = sparse.csr_matrix(S, dtype=float)
    _check_bottom_identity(S)
    n_nodes, n_bottom = S.shape
    y = np.asarray(base, dtype=float)
    vector = y.ndim == 1
    y = y[:, None] if vector else y
    if y.shape[0] != n_nodes:
        raise ValueError(f"base has {y.shape[0]} rows, S has {n_nodes} nodes")
    if not np.all(np.isfinite(y)):
        raise ValueError("base forecasts must be finite")

    if method == "bottom_up":
        bottom = y[-n_bottom:].copy()
    elif method in ("top_down_hist_avg", "top_down_prop_avg"):
        if history is None:
            raise InvalidSpec(f"{method} needs history (actuals of the nodes or bottom series over past periods)")
        proportions = _historical_proportions(history, n_nodes, n_bottom, method=method)
        bottom = proportions[:, None] * y[_top_row(S)][None, :]
    else:
        apply_w_inverse, inv_diag, low_rank = _inverse_covariance(method, S, residuals=residuals, weights=weights)
        rhs = S.T @ apply_w_inverse(y)
        bottom = _solve_normal_equations(S, apply_w_inverse, inv_diag, low_rank, rhs, y[-n_bottom:],
                                         tolerance=tolerance, max_iterations=max_iterations)
    if nonnegative:
        bottom = np.clip(bottom, 0.0, None)
    full = S @ bottom
    return full[:, 0] if vector else full
