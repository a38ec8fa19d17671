"""Exact path-dependent TreeSHAP, compiled with numba, faster than LightGBM's ``pred_contrib``.

The method is Fast TreeSHAP v2 (Yang 2021, arXiv:2109.09847) in a compact form. A leaf l with
value v and unique path features F (|F| = d, zero fractions z_j from the training cover) adds
v * prod_{j in S} o_j * prod_{j in F \\ S} z_j to the tree's expectation given the coalition S,
where o_j = 1 when the row takes every split on j towards l. With A the set of features the row
satisfies, the leaf's Shapley value for feature i (weights w(k) = k! (d-1-k)! / d!) is

    i not in A:  -E(A)
    i in A:      (1 - z_i) / z_i * E(A \\ {i})
    E(B) = v * prod_{j in F \\ B} z_j * sum_{S subset of B} w(|S|) prod_{j in B \\ S} z_j

so one table E of 2^d numbers per leaf, computed once per model, turns every row into a walk
down each tree plus d look-ups per leaf. All terms in E are positive, so there is no cancellation.
LightGBM's routing is reproduced exactly: missing types None/Zero/NaN with default_left, values
within 1e-35 of zero read as zero (as its dense-row reader does), categorical splits by bitset
with NaN, negative and out-of-range categories sent right.

Models it cannot handle (more than one tree per iteration, linear or averaged trees, a split with
an empty side, paths whose tables would take too much memory) fall back to ``pred_contrib`` with
one warning that says why.
"""

from __future__ import annotations

import math
import warnings

import lightgbm as lgb
import numpy as np
from numba import njit, prange, uint64

from causeline.service.explain import treeshap
from causeline.service.explain.treeparse import CATEGORICAL, Forest, parse_forest

ENGINE = "fast-treeshap-v2"
# A leaf with d unique path features keeps 2^d float64 numbers (and builds them with a scratch
# table of 2^d (d + 1)): 16 features give 512 KiB per leaf, 9 MiB of scratch.
MAX_PATH_FEATURES = 16
# Every table of the model together: 2^24 float64 numbers are 128 MiB.
MAX_TABLE_ENTRIES = 1 << 24
ROWS_PER_BLOCK = 128  # rows walked through one tree before the next: the tree stays in cache
ZERO = float(np.float32(1e-35))  # LightGBM's kZeroThreshold, a float constant widened to double
INT_LIMIT = 2.0**31


class FallbackWarning(UserWarning):
    """The fast explainer does not support this model; LightGBM's own TreeSHAP is used."""


def supports(
    booster: lgb.Booster,
    max_path_features: int = MAX_PATH_FEATURES,
    max_table_entries: int = MAX_TABLE_ENTRIES,
) -> str | None:
    """None when :class:`FastTreeExplainer` explains ``booster`` itself, else the reason."""
    model = booster.dump_model()
    reason = _model_reason(model)
    if reason is not None:
        return reason
    return _forest_reason(parse_forest(model), max_path_features, max_table_entries)


class FastTreeExplainer:
    """Exact TreeSHAP values for one LightGBM booster, equal to ``pred_contrib=True``."""

    def __init__(
        self,
        booster: lgb.Booster,
        max_path_features: int = MAX_PATH_FEATURES,
        max_table_entries: int = MAX_TABLE_ENTRIES,
    ) -> None:
        self.booster = booster
        model = booster.dump_model()
        self.num_features = booster.num_feature()
        self.reason = _model_reason(model)
        self._forest: Forest | None = None
        if self.reason is None:
            forest = parse_forest(model)
            self.reason = _forest_reason(forest, max_path_features, max_table_entries)
            if self.reason is None:
                self._forest = forest
                self._prepare(forest)
        if self.reason is not None:
            warnings.warn(
                f"explaining with LightGBM's pred_contrib instead of {ENGINE}: {self.reason}",
                FallbackWarning,
                stacklevel=2,
            )

    @property
    def engine(self) -> str:
        """Which engine explains: this module's, or LightGBM's own after a fallback."""
        return treeshap.ENGINE if self._forest is None else ENGINE

    def contributions(self, x: np.ndarray) -> treeshap.Contributions:
        """SHAP values in raw score (log-odds) for each row of ``x``, and the base value."""
        if self._forest is None:
            return treeshap.contributions(self.booster, x)
        x = np.ascontiguousarray(x, dtype=np.float64)
        if x.ndim != 2 or x.shape[1] != self.num_features:
            raise ValueError(
                f"expected rows of {self.num_features} features, got an array of shape {x.shape}"
            )
        values = np.zeros((x.shape[0], self.num_features), dtype=np.float64)
        if x.shape[0] <= treeshap.SMALL_BATCH:
            _explain_serial(x, values, self._arrays, self._scratch)
        else:
            _explain_parallel(x, values, self._arrays, self._scratch, ROWS_PER_BLOCK)
        return treeshap.Contributions(values=values, base_value=self._forest.base_value)

    def _prepare(self, forest: Forest) -> None:
        sizes = np.left_shift(np.int64(1), forest.leaf_size)
        table_start = np.concatenate(([0], np.cumsum(sizes)[:-1])).astype(np.int64)
        tables, ratios = _build_tables(
            forest.leaf_value,
            forest.leaf_start,
            forest.leaf_size,
            forest.path_zero,
            table_start,
            int(sizes.sum()),
            int(forest.leaf_size.max(initial=0)),
        )
        # Children as places in one per-tree scratch array: the tree's splits, then its leaves.
        tree = np.repeat(np.arange(forest.tree_splits.size - 1), np.diff(forest.tree_splits))
        first_split, first_leaf = forest.tree_splits[tree], forest.tree_leaves[tree]
        splits = forest.tree_splits[tree + 1] - first_split

        def place(child: np.ndarray) -> np.ndarray:
            return np.where(child >= 0, child - first_split, splits + (-1 - child) - first_leaf)

        # Every array the kernels index with is unsigned: numba then skips its negative-index
        # wraparound on each read, which made the leaf loop 1.7 times faster.
        def index(array: np.ndarray) -> np.ndarray:
            return np.ascontiguousarray(array, dtype=np.uint64)

        self._arrays = (
            index(forest.tree_splits),
            index(forest.tree_leaves),
            index(forest.feature),
            forest.threshold,
            forest.kind,
            forest.missing,
            forest.default_left,
            index(place(forest.left)),
            index(place(forest.right)),
            index(forest.slot),
            index(forest.cat_start),
            index(forest.cat_words),
            forest.bitsets,
            index(forest.leaf_start),
            index(forest.leaf_size),
            index(forest.path_feature),
            index(table_start),
            tables,
            ratios,
        )
        places = np.diff(forest.tree_splits) + np.diff(forest.tree_leaves)
        self._scratch = int(np.max(places, initial=1))


def _model_reason(model: dict) -> str | None:
    per_iteration = int(model.get("num_tree_per_iteration", 1))
    if per_iteration != 1:
        return f"the model grows {per_iteration} trees per iteration (multiclass or multi-output)"
    if model.get("average_output"):
        return "the model averages its trees (random forest mode)"
    return None


def _forest_reason(forest: Forest, max_path_features: int, max_table_entries: int) -> str | None:
    if forest.linear:
        return "the model has linear trees"
    if not np.all(forest.path_zero > 0.0):
        return "a split sends no training rows to one side, so its cover ratio is zero"
    widest = int(forest.leaf_size.max(initial=0))
    if widest > max_path_features:
        return (
            f"a root-to-leaf path uses {widest} distinct features, more than the "
            f"{max_path_features} this explainer tabulates"
        )
    entries = int(np.sum(np.left_shift(np.int64(1), forest.leaf_size)))
    if entries > max_table_entries:
        return (
            f"the per-leaf tables would hold {entries} numbers, more than the limit of "
            f"{max_table_entries}"
        )
    return None


@njit(cache=True)
def _build_tables(leaf_value, leaf_start, leaf_size, path_zero, table_start, total, widest):
    """E(B) for every leaf and subset B of its path features; (1 - z) / z per path feature."""
    tables = np.zeros(total, dtype=np.float64)
    ratios = np.empty(path_zero.shape[0], dtype=np.float64)
    poly = np.empty((1 << widest, widest + 1), dtype=np.float64)
    product = np.empty(1 << widest, dtype=np.float64)
    weights = np.empty(widest + 1, dtype=np.float64)
    for leaf in range(leaf_size.shape[0]):
        d = leaf_size[leaf]
        if d == 0:
            continue
        first = leaf_start[leaf]
        for k in range(d):
            z = path_zero[first + k]
            ratios[first + k] = (1.0 - z) / z
        # w(k) = 1 / (d * C(d-1, k)), with C built by the multiplicative formula.
        binomial = 1.0
        for k in range(d):
            weights[k] = 1.0 / (d * binomial)
            binomial = binomial * (d - 1 - k) / (k + 1)
        # poly[B, k]: coefficient of t^k in prod_{j in B} (t + z_j), i.e. the sum over S of
        # size k of prod_{j in B \ S} z_j; product[B] = prod_{j in B} z_j.
        poly[0, 0] = 1.0
        for k in range(1, d + 1):
            poly[0, k] = 0.0
        product[0] = 1.0
        full = (1 << d) - 1
        for mask in range(1, full + 1):
            low = 0
            while not (mask >> low) & 1:
                low += 1
            prev = mask & (mask - 1)
            z = path_zero[first + low]
            product[mask] = product[prev] * z
            poly[mask, 0] = z * poly[prev, 0]
            for k in range(1, d + 1):
                poly[mask, k] = poly[prev, k - 1] + z * poly[prev, k]
        value = leaf_value[leaf]
        base = table_start[leaf]
        for mask in range(full):
            size = 0
            for j in range(d):
                size += (mask >> j) & 1
            total_weight = 0.0
            for k in range(size + 1):
                total_weight += weights[k] * poly[mask, k]
            tables[base + mask] = value * product[full ^ mask] * total_weight
    return tables, ratios


@njit(cache=True)
def _numerical_left(value, threshold, missing, default_left):
    """LightGBM's Tree::NumericalDecision; NaN reads as zero unless NaN is the missing type."""
    if abs(value) <= ZERO:  # its dense-row reader stores such values as zero
        value = 0.0
    if math.isnan(value):
        if missing == 2:
            return default_left
        value = 0.0
    if missing == 1 and value == 0.0:
        return default_left
    return value <= threshold


@njit(cache=True)
def _categorical_left(value, bits, start, words):
    """LightGBM's Tree::CategoricalDecision: NaN, negative or unlisted categories go right."""
    if math.isnan(value) or value <= -1.0 or value >= INT_LIMIT:
        return False
    category = uint64(int(value))  # truncated towards zero, so at least 0 here
    word = category >> uint64(5)
    if word >= words:
        return False
    return (bits[start + word] >> np.uint32(category & uint64(31))) & np.uint32(1) == 1


@njit(cache=True)
def _explain_rows(x, values, start, stop, arrays, failed):
    """Add every tree's contributions for rows start..stop-1, tree by tree."""
    (
        tree_splits,
        tree_leaves,
        feature,
        threshold,
        kind,
        missing,
        default_left,
        left,
        right,
        slot,
        cat_start,
        cat_words,
        bits,
        leaf_start,
        leaf_size,
        path_feature,
        table_start,
        tables,
        ratios,
    ) = arrays
    one = uint64(1)
    for position in range(tree_splits.shape[0] - 1):
        tree = uint64(position)
        first_split, last_split = tree_splits[tree], tree_splits[tree + one]
        first_leaf, last_leaf = tree_leaves[tree], tree_leaves[tree + one]
        splits = last_split - first_split
        if splits == 0:
            continue
        for position_row in range(start, stop):
            row = uint64(position_row)
            out = values[row]
            data = x[row]
            # Splits come parent first, so one pass hands each child the path features whose
            # splits the row has failed so far (as bits in the leaf's unique-feature order).
            failed[0] = 0
            for node in range(first_split, last_split):
                value = data[feature[node]]
                if kind[node] == CATEGORICAL:
                    go_left = _categorical_left(value, bits, cat_start[node], cat_words[node])
                else:
                    go_left = _numerical_left(
                        value, threshold[node], missing[node], default_left[node]
                    )
                # Arithmetic rather than branches: the direction is a coin flip to the CPU.
                mask = failed[node - first_split]
                bit = one << slot[node]
                went_left = uint64(go_left)
                failed[left[node]] = mask | (bit * (one - went_left))
                failed[right[node]] = mask | (bit * went_left)
            for leaf in range(first_leaf, last_leaf):
                d = leaf_size[leaf]
                first = leaf_start[leaf]
                held = ((one << d) - one) & ~failed[splits + (leaf - first_leaf)]
                table = table_start[leaf]
                for k in range(d):
                    # Both cases read E at the held set without k, scaled by (1 - z) / z when
                    # the row holds k and by -1 when it does not (exact for h in {0, 1}).
                    h = (held >> k) & one
                    scale = ratios[first + k] * h + (np.float64(h) - 1.0)
                    out[path_feature[first + k]] += scale * tables[table + (held & ~(h << k))]


@njit(cache=True)
def _explain_serial(x, values, arrays, scratch):
    failed = np.empty(scratch, dtype=np.uint64)
    _explain_rows(x, values, 0, x.shape[0], arrays, failed)


@njit(parallel=True, cache=True)
def _explain_parallel(x, values, arrays, scratch, block):
    rows = x.shape[0]
    for index in prange((rows + block - 1) // block):
        failed = np.empty(scratch, dtype=np.uint64)
        start = index * block
        _explain_rows(x, values, start, min(rows, start + block), arrays, failed)
