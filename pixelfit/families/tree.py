"""tree: a decision tree of depth d over the pixels (scikit-learn's CART)."""

from __future__ import annotations

import numpy as np

from pixelfit.errors import RuleFileError
from pixelfit.families._base import CTable, Family, IntegerModel, Model, array, bits, c_type_for, figures, flat_pixels, ops, rc


class TreeFamily(Family):
    name = "tree"
    description = "decision tree of depth d"
    size_name = "depth"
    title_format = "decision tree of {n}"
    map_name = "impurity decrease from splits on each pixel"

    def size_text(self, size):
        return f"depth {size}"

    def sizes_text(self, sizes):
        return f"depth {', '.join(map(str, sizes))}"

    def default_sizes(self, n_pixels):
        return list(range(1, 9))

    def make(self, size, n_pixels, seed):
        from sklearn.tree import DecisionTreeClassifier

        return DecisionTreeClassifier(max_depth=size, random_state=seed)

    def size_figures(self, est, size, n_pixels):
        from pixelfit.models import log2_tree_class

        return figures(int(est.tree_.node_count), log2_class_size=log2_tree_class(n_pixels, size))

    def native_importance(self, est, X, y, shape):
        return est.feature_importances_.astype(np.float64).reshape(shape)

    def section(self, est, shape):
        w = shape[1]
        t = est.tree_
        nodes = []
        for i in range(t.node_count):
            leaf = t.children_left[i] == -1
            v = t.value[i][0]
            frac = float(v[1] / v.sum()) if v.sum() > 0 else 0.0
            n = int(t.n_node_samples[i])
            pos = int(round(frac * n))  # value holds class fractions (or counts): n and the share give the counts
            nodes.append({"pixel": None if leaf else rc(t.feature[i], w), "left": int(t.children_left[i]),
                          "right": int(t.children_right[i]), "label": int(v[1] > v[0]), "score": frac,
                          "counts": [n - pos, pos]})
        return {"nodes": nodes, "branch": "go to 'left' when the pixel is 0, to 'right' when it is 1"}

    def decode(self, m, shape):
        nodes = m["nodes"]
        n = len(nodes)
        feat = np.full(n, -1, np.intp)
        left = np.full(n, -1, np.intp)
        right = np.full(n, -1, np.intp)
        label = np.zeros(n, bool)
        score = np.zeros(n)
        for i, node in enumerate(nodes):
            lo, ro = node["left"], node["right"]
            if node["pixel"] is None:
                if lo != -1 or ro != -1:
                    raise RuleFileError(f"model/nodes/{i}: a leaf (pixel null) must have left = right = -1")
            else:
                feat[i] = flat_pixels([node["pixel"]], shape, f"model/nodes/{i}/pixel")[0]
                # Children come after their parent: the tree has no cycles and every walk ends.
                for side, child in (("left", lo), ("right", ro)):
                    if not (i < child < n):
                        raise RuleFileError(f"model/nodes/{i}/{side}: child {child} must be a later node (< {n})")
            left[i], right[i] = lo, ro
            label[i], score[i] = bool(node["label"]), float(node["score"])
        counts = None
        if all(node.get("counts") is not None for node in nodes):
            counts = array([node["counts"] for node in nodes], "model/nodes/counts", (n, 2), np.int64)
        return TreeModel(feat, left, right, label, score, counts)


def _walk(X: np.ndarray, feat, left, right) -> np.ndarray:
    """The leaf each patch reaches."""
    X = bits(X)
    n = len(X)
    node = np.zeros(n, np.intp)
    rows = np.arange(n)
    for _ in range(len(feat)):
        inner = feat[node] >= 0
        if not inner.any():
            break
        r, nd = rows[inner], node[inner]
        node[inner] = np.where(X[r, feat[nd]], right[nd], left[nd])
    return node


class TreeModel(Model):
    def __init__(self, feat, left, right, label, score, counts=None):
        self.feat, self.left, self.right, self.label, self.score = feat, left, right, label, score
        self.counts = counts  # training patches (negative, positive) reaching each node, or None

    def decide(self, X):
        leaf = _walk(X, self.feat, self.left, self.right)
        return self.score[leaf], self.label[leaf]

    def pixels_used(self):
        return sorted({int(i) for i in self.feat[self.feat >= 0]})

    def explain(self, x, shape, threshold):
        x = np.asarray(x, bool).reshape(-1)
        w = shape[1]
        path, node = [], 0
        while self.feat[node] >= 0:
            value = bool(x[self.feat[node]])
            path.append({"node": node, "pixel": rc(self.feat[node], w), "value": int(value),
                         "branch": "right" if value else "left"})
            node = int(self.right[node] if value else self.left[node])
        c = self.counts
        leaf = {"node": node, "label": bool(self.label[node]), "score": float(self.score[node]),
                "negative": None if c is None else int(c[node, 0]), "positive": None if c is None else int(c[node, 1])}
        return {"kind": "tree", "path": path, "leaf": leaf,
                "note": "from the root: a pixel's value 0 goes left, 1 goes right; the leaf's counts are the "
                        "training patches of each class that reach it"
                        + ("" if c is not None else " (not recorded in this rule file)")}

    def integer(self, threshold=None):
        return TreeInteger(self.feat, self.left, self.right, self.label if threshold is None else self.score > threshold)


class TreeInteger(IntegerModel):
    """Four node tables (pixel or -1 at a leaf, left child, right child, label): exact."""

    def __init__(self, feat, left, right, label):
        self.feat, self.left, self.right, self.label = feat, left, right, np.asarray(label, bool)
        self.index_type = c_type_for(np.concatenate([feat, left, right]))
        self.tables = [CTable("pixel", self.index_type, feat), CTable("left", self.index_type, left),
                       CTable("right", self.index_type, right), CTable("label", "uint8_t", self.label.astype(np.int64))]
        self.facts = {}

    def predict(self, X):
        return self.label[_walk(X, self.feat, self.left, self.right)]

    def c_code(self, ident, P):
        t = self.index_type
        return (f"    {t} node = 0;\n    while ({ident}_pixel[node] >= 0) {{\n"
                f"        node = (patch[{ident}_pixel[node]] != 0u) ? {ident}_right[node] : {ident}_left[node];\n"
                f"    }}\n    return {ident}_label[node];")

    def depth(self) -> int:
        """Inner nodes on the longest path from the root to a leaf."""
        depth = np.zeros(len(self.feat), np.intp)
        for i in range(len(self.feat)):  # children come after their parents
            if self.feat[i] >= 0:
                depth[self.left[i]] = depth[self.right[i]] = depth[i] + 1
        return int(depth.max(initial=0))

    def ram_bytes(self):
        return 2 if self.index_type == "int16_t" else 4

    def ops(self):
        d = self.depth()
        # d pixel tests, and d + 1 is-this-a-leaf tests.
        return ops(pixel_reads=d, comparisons=2 * d + 1)
