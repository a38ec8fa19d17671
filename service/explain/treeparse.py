"""LightGBM's ``dump_model()`` JSON turned into flat arrays, one row per split or leaf.

Flat arrays are what a compiled kernel can walk. Besides the splits themselves, every leaf keeps
the features on its root-to-leaf path, each counted once in order of first use, with the product
of that feature's cover ratios along the path: TreeSHAP's "zero fraction" for the feature after
its repeated splits are merged (Lundberg, Erion & Lee 2018, the unique path of algorithm 2).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

NUMERICAL, CATEGORICAL = 0, 1
MISSING_CODES = {"None": 0, "Zero": 1, "NaN": 2}


@dataclass(frozen=True)
class Forest:
    """Splits and leaves of every tree, children coded as split index, or ``-1 - leaf index``.

    A tree's splits are contiguous and in pre-order (a parent before its children), and so are
    its leaves: tree t owns splits ``tree_splits[t]:tree_splits[t + 1]`` and likewise leaves.
    """

    tree_splits: np.ndarray  # int64, one more than the number of trees
    tree_leaves: np.ndarray  # int64, one more than the number of trees
    feature: np.ndarray  # int64 per split
    threshold: np.ndarray  # float64 per split (unused for categorical splits)
    kind: np.ndarray  # int8 per split: NUMERICAL or CATEGORICAL
    missing: np.ndarray  # int8 per split: MISSING_CODES
    default_left: np.ndarray  # bool per split
    left: np.ndarray  # int64 per split
    right: np.ndarray  # int64 per split
    slot: np.ndarray  # int64 per split: position of its feature among the path's unique features
    cat_start: np.ndarray  # int64 per split: first word of its category bitset
    cat_words: np.ndarray  # int64 per split: number of 32-bit words in that bitset
    bitsets: np.ndarray  # uint32: category bitsets, LightGBM's layout (category c -> bit c % 32)
    leaf_value: np.ndarray  # float64 per leaf
    leaf_start: np.ndarray  # int64 per leaf: first of its unique features in path_feature
    leaf_size: np.ndarray  # int64 per leaf: number of unique features on its path
    path_feature: np.ndarray  # int64: the unique features of every leaf's path, leaf after leaf
    path_zero: np.ndarray  # float64: their cover ratios (zero fractions), same layout
    base_value: float  # expected raw score, summed as LightGBM's Tree::ExpectedValue does
    num_features: int
    linear: bool  # leaves hold linear models (LightGBM's linear_tree)


def parse_forest(model: dict) -> Forest:
    """Flatten ``Booster.dump_model()`` for a model with one tree per iteration."""
    builder = _Builder()
    for tree in model["tree_info"]:
        builder.add_tree(tree["tree_structure"])
    return builder.finish(int(model["max_feature_idx"]) + 1)


class _Builder:
    def __init__(self) -> None:
        self.tree_splits: list[int] = []
        self.tree_leaves: list[int] = []
        self.splits: list[list] = []
        self.bitsets: list[int] = []
        self.leaves: list[tuple[float, int, int]] = []
        self.path_feature: list[int] = []
        self.path_zero: list[float] = []
        self.base_value = 0.0
        self.linear = False

    def add_tree(self, root: dict) -> None:
        self.tree_splits.append(len(self.splits))
        self.tree_leaves.append(len(self.leaves))
        if "leaf_value" in root:
            # A stump with no split adds its value to every row; it explains nothing.
            self._leaf(root, [], [])
            self.base_value += float(root["leaf_value"])
            return
        tree_leaves: list[tuple[int, float, float]] = []  # leaf index, count, value
        # Explicit stack: LightGBM trees can be far deeper than Python's recursion limit.
        stack: list[tuple[dict, list[int], list[float], int, bool]] = [(root, [], [], -1, False)]
        while stack:
            node, features, zeros, parent, is_left = stack.pop()
            if "leaf_value" in node:
                self._link(parent, is_left, self._leaf(node, features, zeros))
                tree_leaves.append(
                    (int(node["leaf_index"]), float(node["leaf_count"]), float(node["leaf_value"]))
                )
                continue
            index = len(self.splits)
            self._link(parent, is_left, index)
            feature = int(node["split_feature"])
            if feature in features:
                slot = features.index(feature)
            else:
                slot = len(features)
                features = [*features, feature]
                zeros = [*zeros, 1.0]
            self.splits.append(self._split(node, feature, slot))
            total = float(node["internal_count"])
            for child, left_side in ((node["right_child"], False), (node["left_child"], True)):
                child_zeros = list(zeros)
                child_zeros[slot] *= _count(child) / total
                stack.append((child, features, child_zeros, index, left_side))
        # LightGBM's ExpectedValue: leaf counts over the root's count, in leaf order.
        total = float(root["internal_count"])
        for _, count, value in sorted(tree_leaves):
            self.base_value += count / total * value

    def _link(self, parent: int, is_left: bool, child: int) -> None:
        if parent < 0:
            return
        self.splits[parent][5 if is_left else 6] = child

    def _leaf(self, node: dict, features: list[int], zeros: list[float]) -> int:
        self.linear = self.linear or "leaf_coeff" in node
        self.leaves.append((float(node["leaf_value"]), len(self.path_feature), len(features)))
        self.path_feature.extend(features)
        self.path_zero.extend(zeros)
        return -len(self.leaves)

    def _split(self, node: dict, feature: int, slot: int) -> list:
        missing = MISSING_CODES[str(node["missing_type"])]
        default_left = bool(node["default_left"])
        if node["decision_type"] == "==":
            categories = [int(c) for c in str(node["threshold"]).split("||")]
            words = max(categories) // 32 + 1
            start = len(self.bitsets)
            self.bitsets.extend([0] * words)
            for category in categories:
                self.bitsets[start + category // 32] |= 1 << (category % 32)
            return [feature, np.nan, CATEGORICAL, missing, default_left, -1, -1, slot, start, words]
        if node["decision_type"] != "<=":
            raise ValueError(f"unknown decision type {node['decision_type']!r}")
        threshold = float(node["threshold"])
        return [feature, threshold, NUMERICAL, missing, default_left, -1, -1, slot, 0, 0]

    def finish(self, num_features: int) -> Forest:
        columns = list(zip(*self.splits, strict=True)) if self.splits else [()] * 10
        leaves = list(zip(*self.leaves, strict=True)) if self.leaves else [()] * 3
        return Forest(
            tree_splits=np.asarray([*self.tree_splits, len(self.splits)], dtype=np.int64),
            tree_leaves=np.asarray([*self.tree_leaves, len(self.leaves)], dtype=np.int64),
            feature=np.asarray(columns[0], dtype=np.int64),
            threshold=np.asarray(columns[1], dtype=np.float64),
            kind=np.asarray(columns[2], dtype=np.int8),
            missing=np.asarray(columns[3], dtype=np.int8),
            default_left=np.asarray(columns[4], dtype=np.bool_),
            left=np.asarray(columns[5], dtype=np.int64),
            right=np.asarray(columns[6], dtype=np.int64),
            slot=np.asarray(columns[7], dtype=np.int64),
            cat_start=np.asarray(columns[8], dtype=np.int64),
            cat_words=np.asarray(columns[9], dtype=np.int64),
            bitsets=np.asarray(self.bitsets, dtype=np.uint32),
            leaf_value=np.asarray(leaves[0], dtype=np.float64),
            leaf_start=np.asarray(leaves[1], dtype=np.int64),
            leaf_size=np.asarray(leaves[2], dtype=np.int64),
            path_feature=np.asarray(self.path_feature, dtype=np.int64),
            path_zero=np.asarray(self.path_zero, dtype=np.float64),
            base_value=self.base_value,
            num_features=num_features,
            linear=self.linear,
        )


def _count(node: dict) -> float:
    return float(node["leaf_count"] if "leaf_value" in node else node["internal_count"])
