"""Checks run on a saved model before any of it reaches an engine's parser.

Three layers, each refusing with ValueError:

* :func:`parse_json` reads JSON strictly: duplicate keys, NaN/Infinity
  constants and nesting deeper than a limit are refused (deep nesting would
  otherwise exhaust Python's recursion limit inside the parser).
* :func:`seal` / :func:`verify_seal` compute and check one digest over the
  whole lossfam document (canonical JSON of every field but the seal itself):
  SHA-256 without a key, HMAC-SHA-256 with one (``hmac``, ``hashlib``).
* :func:`check_xgboost_json` and :func:`check_lightgbm_text` check the
  engine's own model structurally (tree counts, node counts, child indices,
  split features within the feature count, array lengths, finite values), so
  that a file whose digest was recomputed after an edit still cannot make the
  engine read outside its arrays or abort the process.

What the seal promises: without a key it detects corruption (a flipped byte,
truncation, a hand edit) but not deliberate tampering, since anyone can
recompute a SHA-256.  With a key only holders of the key can produce a file
that verifies.  Either way, load only files from sources you trust.
"""
from __future__ import annotations

import hashlib
import hmac
import json
import math
import re

import numpy as np

#: nesting allowed in the lossfam document and in XGBoost's model JSON
MAX_DEPTH = 32
_STRING = re.compile(rb'"(?:[^"\\]|\\.)*"', re.DOTALL)


# --------------------------------------------------------------------------- JSON
def _depth(raw: bytes) -> int:
    """Maximum bracket nesting of a JSON text (brackets inside strings ignored)."""
    bare = _STRING.sub(b"", raw)
    codes = np.frombuffer(bare, dtype=np.uint8)
    step = np.zeros(codes.shape, dtype=np.int64)
    step[(codes == ord("[")) | (codes == ord("{"))] = 1
    step[(codes == ord("]")) | (codes == ord("}"))] = -1
    return int(np.cumsum(step).max(initial=0))


def _no_duplicates(pairs):
    out = {}
    for k, v in pairs:
        if k in out:
            raise ValueError(f"the key {k!r} appears twice in one object")
        out[k] = v
    return out


def _no_constants(name):
    raise ValueError(f"{name} is not a JSON number")


def parse_json(text, what: str, *, max_depth: int = MAX_DEPTH):
    """Parse JSON strictly: ValueError for invalid text, duplicate keys, NaN/Infinity or deep nesting."""
    raw = text.encode("utf-8") if isinstance(text, str) else bytes(text)
    depth = _depth(raw)
    if depth > max_depth:
        raise ValueError(f"{what}: JSON nested {depth} levels deep (at most {max_depth} allowed)")
    try:
        return json.loads(raw.decode("utf-8"), object_pairs_hook=_no_duplicates, parse_constant=_no_constants)
    except UnicodeDecodeError as exc:
        raise ValueError(f"{what}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    except ValueError as exc:  # json.JSONDecodeError is a ValueError
        raise ValueError(f"{what}: not valid JSON ({exc})") from None


# --------------------------------------------------------------------------- seal
SEAL_FIELD = "integrity"
_ALGORITHMS = ("sha256", "hmac-sha256")


def _canonical(body: dict) -> bytes:
    return json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False).encode("ascii")


def _key_bytes(key) -> bytes:
    if isinstance(key, str):
        key = key.encode("utf-8")
    if not isinstance(key, (bytes, bytearray)) or not key:
        raise TypeError("key must be a non-empty str or bytes")
    return bytes(key)


def seal(body: dict, key=None) -> dict:
    """The integrity record of ``body``: SHA-256, or HMAC-SHA-256 when a key is given."""
    data = _canonical(body)
    if key is None:
        return {"algorithm": "sha256", "digest": hashlib.sha256(data).hexdigest()}
    return {"algorithm": "hmac-sha256", "digest": hmac.new(_key_bytes(key), data, hashlib.sha256).hexdigest()}


def reseal(doc: dict, key=None) -> dict:
    """A copy of a parsed document with its integrity record recomputed (for tests of edited files)."""
    body = {k: v for k, v in doc.items() if k != SEAL_FIELD}
    return {**body, SEAL_FIELD: seal(body, key)}


def verify_seal(doc: dict, what: str, key=None) -> None:
    """Check the integrity record of a parsed document (ValueError when it does not match)."""
    rec = doc.get(SEAL_FIELD)
    if not (isinstance(rec, dict) and set(rec) == {"algorithm", "digest"}
            and rec["algorithm"] in _ALGORITHMS and isinstance(rec["digest"], str)):
        raise ValueError(f"{what}: the integrity record is missing or malformed; the file is damaged or was edited")
    signed = rec["algorithm"] == "hmac-sha256"
    if signed and key is None:
        raise ValueError(f"{what}: the file is signed; pass the key it was saved with (key=...)")
    if key is not None and not signed:
        raise ValueError(f"{what}: a key was given but the file is not signed, so its origin cannot be verified")
    body = {k: v for k, v in doc.items() if k != SEAL_FIELD}
    try:
        want = seal(body, key)["digest"]
    except ValueError:  # not serialisable canonically (cannot happen for parsed JSON without constants)
        want = ""
    if not hmac.compare_digest(want, rec["digest"]):
        if signed:
            raise ValueError(f"{what}: the signature does not match: the file was changed, or the key is wrong")
        raise ValueError(f"{what}: the file does not match its checksum; it is corrupted or was edited")


# --------------------------------------------------------------------------- field checks
def is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def is_int(v) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _int_text(v, what, lo=0, hi=2**31 - 1) -> int:
    """XGBoost stores many integers as strings ("7")."""
    if isinstance(v, str) and re.fullmatch(r"-?\d{1,10}", v):
        v = int(v)
    if not is_int(v) or not lo <= v <= hi:
        raise ValueError(f"{what} must be an integer in [{lo}, {hi}], got {v!r}")
    return v


def _int_array(v, n, what, lo, hi) -> np.ndarray:
    if not isinstance(v, list) or (n is not None and len(v) != n):
        size = len(v) if isinstance(v, list) else type(v).__name__
        raise ValueError(f"{what} must be a list of {n} integers, got {size}")
    if not all(is_int(x) for x in v):
        raise ValueError(f"{what} must hold integers only")
    a = np.asarray(v, dtype=np.int64) if v else np.zeros(0, dtype=np.int64)
    if a.size and (a.min() < lo or a.max() > hi):
        raise ValueError(f"{what} has entries outside [{lo}, {hi}]")
    return a


def _float_array(v, n, what) -> np.ndarray:
    if not isinstance(v, list) or (n is not None and len(v) != n):
        size = len(v) if isinstance(v, list) else type(v).__name__
        raise ValueError(f"{what} must be a list of {n} numbers, got {size}")
    if not all(is_number(x) for x in v):
        raise ValueError(f"{what} must hold finite numbers only")
    a = np.asarray(v, dtype=np.float64)
    if a.size and not np.all(np.abs(a) <= np.finfo(np.float32).max):
        raise ValueError(f"{what} has values beyond single precision")
    return a


def _check_tree_shape(left, right, n, what, *, leaf_right_is_index=False):
    """Children form one tree rooted at node 0 over nodes [0, n); returns (internal mask, reached mask).

    A leaf has left child -1 and right child -1, except in multi-output trees
    where a leaf's right entry is its index into the leaf-vector table
    (``leaf_right_is_index``; checked by the caller).
    """
    internal = left >= 0
    leaf_right_ok = right >= 0 if leaf_right_is_index else right == -1
    if np.any(internal & (right < 0)) or np.any(~internal & ~leaf_right_ok) or np.any(left < -1):
        raise ValueError(f"{what}: a node has one child only, or a child index below -1")
    kids = np.concatenate([left[internal], right[internal]])
    if kids.size and (kids.min() < 1 or kids.max() >= n):
        raise ValueError(f"{what}: a child index is outside the tree's {n} nodes")
    if np.unique(kids).size != kids.size:
        raise ValueError(f"{what}: a node is the child of two nodes")
    seen = _reach(n, lambda i: (int(left[i]), int(right[i])) if internal[i] else (), what)
    return internal, seen


def _reach(n, children, what) -> np.ndarray:
    """Nodes reached walking from node 0 (each at most once: a second visit means a cycle)."""
    seen = np.zeros(n, dtype=bool)
    stack = [0]
    while stack:
        i = stack.pop()
        if seen[i]:
            raise ValueError(f"{what}: the nodes form a cycle")
        seen[i] = True
        stack.extend(children(i))
    return seen


# --------------------------------------------------------------------------- XGBoost
_XGB_NODE_INT = ("left_children", "right_children", "parents", "split_indices", "split_type", "default_left")
_XGB_NODE_FLOAT = ("split_conditions", "loss_changes", "sum_hessian")


def _xgb_tree(tree, idx, num_feature, what):
    where = f"{what}: tree {idx}"
    if not isinstance(tree, dict):
        raise ValueError(f"{where} is not an object")
    if tree.get("id") != idx:
        raise ValueError(f"{where} has id {tree.get('id')!r}; trees must be numbered 0, 1, 2, ... in order")
    tp = tree.get("tree_param")
    if not isinstance(tp, dict):
        raise ValueError(f"{where}: tree_param is missing")
    n = _int_text(tp.get("num_nodes"), f"{where}: num_nodes", 1)
    deleted = _int_text(tp.get("num_deleted", "0"), f"{where}: num_deleted", 0, n - 1)
    if _int_text(tp.get("num_feature"), f"{where}: num_feature") != num_feature:
        raise ValueError(f"{where}: num_feature disagrees with the model's {num_feature}")
    slv = max(1, _int_text(tp.get("size_leaf_vector", "1"), f"{where}: size_leaf_vector", 0, 2**16))
    arrays = {}
    for name in _XGB_NODE_INT:
        arrays[name] = _int_array(tree.get(name), n, f"{where}: {name}", -1, 2**31 - 1)
    for name in _XGB_NODE_FLOAT:
        _float_array(tree.get(name), n, f"{where}: {name}")
    _float_array(tree.get("base_weights"), n * slv, f"{where}: base_weights")
    left, right = arrays["left_children"], arrays["right_children"]
    internal, reached = _check_tree_shape(left, right, n, where, leaf_right_is_index=slv > 1)
    if slv > 1:  # multi-output tree: leaves index a table of leaf vectors
        n_leaves = int((~internal).sum())
        _float_array(tree.get("leaf_weights"), n_leaves * slv, f"{where}: leaf_weights")
        if not np.array_equal(np.sort(right[~internal]), np.arange(n_leaves)):
            raise ValueError(f"{where}: the leaves' indices into leaf_weights are not 0 .. {n_leaves - 1}")
    if n - int(reached.sum()) != deleted:
        raise ValueError(f"{where}: {n - int(reached.sum())} nodes are unreachable but num_deleted is {deleted}")
    par = arrays["parents"]
    for side in (left, right):
        kids = side[internal & reached]
        if np.any(par[kids] != np.flatnonzero(internal & reached)):
            raise ValueError(f"{where}: parents disagree with the child indices")
    splits = arrays["split_indices"][internal & reached]
    if splits.size and (splits.min() < 0 or splits.max() >= num_feature):
        raise ValueError(f"{where}: a split uses a feature outside the model's {num_feature} features")
    if np.any(arrays["default_left"] > 1) or np.any(arrays["default_left"] < 0):
        raise ValueError(f"{where}: default_left must be 0 or 1")
    stype = arrays["split_type"]
    if np.any((stype != 0) & (stype != 1)):
        raise ValueError(f"{where}: split_type must be 0 or 1")
    cats = _int_array(tree.get("categories", []), None, f"{where}: categories", 0, 2**24)
    cnodes = _int_array(tree.get("categories_nodes", []), None, f"{where}: categories_nodes", 0, n - 1)
    seg = _int_array(tree.get("categories_segments", []), cnodes.size, f"{where}: categories_segments", 0, cats.size)
    size = _int_array(tree.get("categories_sizes", []), cnodes.size, f"{where}: categories_sizes", 0, cats.size)
    if np.any(seg + size > cats.size):
        raise ValueError(f"{where}: a category segment runs past the category list")
    cat_internal = np.flatnonzero((stype == 1) & internal & reached)
    if not np.array_equal(np.sort(cnodes), cat_internal):
        raise ValueError(f"{where}: categorical splits and their category lists disagree")


def check_xgboost_json(text: str, what: str) -> str:
    """Validate an XGBoost JSON model structurally; return it re-serialised (what was checked is what loads)."""
    doc = parse_json(text, f"{what}: the XGBoost model", max_depth=MAX_DEPTH)
    what = f"{what}: the XGBoost model"
    try:
        learner = doc["learner"]
        mp = learner["learner_model_param"]
        gb = learner["gradient_booster"]
    except (KeyError, TypeError):
        raise ValueError(f"{what} lacks learner / learner_model_param / gradient_booster") from None
    if not (isinstance(mp, dict) and isinstance(gb, dict)):
        raise ValueError(f"{what}: learner_model_param and gradient_booster must be objects")
    num_feature = _int_text(mp.get("num_feature"), f"{what}: num_feature", 0, 2**31 - 2)
    num_class = _int_text(mp.get("num_class", "0"), f"{what}: num_class", 0, 2**20)
    num_target = _int_text(mp.get("num_target", "1"), f"{what}: num_target", 1, 2**20)
    groups = max(num_class, num_target, 1)
    base = mp.get("base_score")
    if not isinstance(base, str) or not re.fullmatch(r"\[?[-+0-9.eE,]+\]?", base):
        raise ValueError(f"{what}: base_score {base!r} is not a number")
    try:
        values = [float(s) for s in base.strip("[]").split(",")]
    except ValueError:
        raise ValueError(f"{what}: base_score {base!r} is not a number") from None
    if not all(math.isfinite(v) for v in values) or len(values) not in (1, groups):
        raise ValueError(f"{what}: base_score {base!r} must hold 1 or {groups} finite numbers")
    for key in ("feature_names", "feature_types"):
        names = learner.get(key, [])
        if not (isinstance(names, list) and all(isinstance(s, str) for s in names) and len(names) in (0, num_feature)):
            raise ValueError(f"{what}: {key} must list 0 or {num_feature} strings")
    name = gb.get("name")
    if name == "gblinear":
        model = gb.get("model")
        weights = model.get("weights") if isinstance(model, dict) else None
        _float_array(weights, (num_feature + 1) * groups, f"{what}: weights")
        return json.dumps(doc, separators=(",", ":"))
    if name == "dart":
        inner = gb.get("gbtree")
        model = inner.get("model") if isinstance(inner, dict) else None
    elif name == "gbtree":
        model = gb.get("model")
    else:
        raise ValueError(f"{what}: unknown booster {name!r}")
    if not isinstance(model, dict):
        raise ValueError(f"{what}: the tree model is missing")
    trees = model.get("trees")
    if not isinstance(trees, list):
        raise ValueError(f"{what}: the tree list is missing")
    param = model.get("gbtree_model_param")
    if not isinstance(param, dict):
        raise ValueError(f"{what}: gbtree_model_param is missing")
    if _int_text(param.get("num_trees"), f"{what}: num_trees") != len(trees):
        raise ValueError(f"{what}: num_trees says {param.get('num_trees')} but {len(trees)} trees are stored")
    _int_text(param.get("num_parallel_tree", "1"), f"{what}: num_parallel_tree", 1, 2**16)
    _int_array(model.get("tree_info"), len(trees), f"{what}: tree_info", 0, groups - 1)
    indptr = _int_array(model.get("iteration_indptr", [0, len(trees)] if trees else [0]), None,
                        f"{what}: iteration_indptr", 0, len(trees))
    if indptr.size == 0 or indptr[0] != 0 or indptr[-1] != len(trees) or np.any(np.diff(indptr) < 0):
        raise ValueError(f"{what}: iteration_indptr must rise from 0 to the number of trees")
    if name == "dart":
        _float_array(gb.get("weight_drop"), len(trees), f"{what}: weight_drop")
    for i, tree in enumerate(trees):
        _xgb_tree(tree, i, num_feature, what)
    return json.dumps(doc, separators=(",", ":"))


# --------------------------------------------------------------------------- LightGBM
_NUM = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_NUMS = re.compile(rf"(?:{_NUM})(?: {_NUM})*")
_INTS = re.compile(r"-?\d{1,10}(?: -?\d{1,10})*")
_OBJECTIVES = {
    "custom", "none", "regression", "regression_l1", "huber", "fair", "quantile", "mape", "poisson", "gamma",
    "tweedie", "binary", "multiclass", "multiclassova", "cross_entropy", "cross_entropy_lambda", "lambdarank",
    "rank_xendcg",
}
_HEADER_REQUIRED = ("version", "num_class", "num_tree_per_iteration", "label_index", "max_feature_idx",
                    "feature_names", "feature_infos")


def _lgb_numbers(s, n, what, *, ints=False):
    if n == 0:
        if s not in ("", None):
            raise ValueError(f"{what} must be empty")
        return np.zeros(0)
    if s is None or not (_INTS if ints else _NUMS).fullmatch(s):
        raise ValueError(f"{what} must be {n} space-separated {'integers' if ints else 'numbers'}")
    a = np.array(s.split(" "), dtype=np.int64 if ints else np.float64)
    if a.size != n:
        raise ValueError(f"{what} has {a.size} entries, expected {n}")
    if not ints and not np.all(np.isfinite(a)):
        raise ValueError(f"{what} has values that are not finite")
    return a


def _lgb_tree(fields, idx, n_feature, what):
    where = f"{what}: tree {idx}"

    def count(key, lo, hi):
        v = fields.get(key)
        if v is None or not re.fullmatch(r"\d{1,10}", v) or not lo <= int(v) <= hi:
            raise ValueError(f"{where}: {key} must be an integer in [{lo}, {hi}], got {v!r}")
        return int(v)

    leaves = count("num_leaves", 1, 2**31 - 1)
    num_cat = count("num_cat", 0, leaves - 1)
    shrink = fields.get("shrinkage")
    if shrink is not None:
        _lgb_numbers(shrink, 1, f"{where}: shrinkage")
    linear = count("is_linear", 0, 1) if "is_linear" in fields else 0
    n_int = leaves - 1
    _lgb_numbers(fields.get("leaf_value"), leaves, f"{where}: leaf_value")
    for key in ("leaf_weight", "leaf_count"):
        if key in fields:
            _lgb_numbers(fields[key], leaves, f"{where}: {key}")
    if linear:
        _lgb_numbers(fields.get("leaf_const"), leaves, f"{where}: leaf_const")
        nf = _lgb_numbers(fields.get("num_features"), leaves, f"{where}: num_features", ints=True)
        if np.any(nf < 0):
            raise ValueError(f"{where}: num_features must be >= 0")
        total = int(nf.sum())
        # one space-terminated group per leaf (groups may be empty): compare the token counts
        feats = _lgb_numbers(" ".join((fields.get("leaf_features") or "").split()), total,
                             f"{where}: leaf_features", ints=True)
        _lgb_numbers(" ".join((fields.get("leaf_coeff") or "").split()), total, f"{where}: leaf_coeff")
        if feats.size and (feats.min() < 0 or feats.max() >= n_feature):
            raise ValueError(f"{where}: a linear leaf uses a feature outside the model's {n_feature} features")
    if n_int == 0:
        return
    feat = _lgb_numbers(fields.get("split_feature"), n_int, f"{where}: split_feature", ints=True)
    if feat.min() < 0 or feat.max() >= n_feature:
        raise ValueError(f"{where}: a split uses a feature outside the model's {n_feature} features")
    thr = _lgb_numbers(fields.get("threshold"), n_int, f"{where}: threshold")
    dtype = _lgb_numbers(fields.get("decision_type"), n_int, f"{where}: decision_type", ints=True)
    if np.any((dtype < 0) | (dtype > 15) | ((dtype >> 2) == 3)):
        raise ValueError(f"{where}: decision_type has unknown bits")
    for key in ("split_gain", "internal_value", "internal_weight", "internal_count"):
        if key in fields:
            _lgb_numbers(fields[key], n_int, f"{where}: {key}")
    left = _lgb_numbers(fields.get("left_child"), n_int, f"{where}: left_child", ints=True)
    right = _lgb_numbers(fields.get("right_child"), n_int, f"{where}: right_child", ints=True)
    kids = np.concatenate([left, right])
    nodes, leaf_ids = kids[kids >= 0], ~kids[kids < 0]
    if (nodes.size and (nodes.min() < 1 or nodes.max() >= n_int)) or (leaf_ids.size and leaf_ids.max() >= leaves):
        raise ValueError(f"{where}: a child index is outside the tree's {n_int} nodes and {leaves} leaves")
    if np.unique(nodes).size != n_int - 1 or np.unique(leaf_ids).size != leaves:
        raise ValueError(f"{where}: the child indices do not form a tree")
    # walk from the root (negative children are leaves): every internal node reached once
    seen = _reach(n_int, lambda i: [int(c) for c in (left[i], right[i]) if c >= 0], where)
    if not seen.all():
        raise ValueError(f"{where}: some nodes are unreachable from the root")
    cat = (dtype & 1) == 1
    if cat.any() or num_cat:
        bounds = _lgb_numbers(fields.get("cat_boundaries"), num_cat + 1, f"{where}: cat_boundaries", ints=True)
        if bounds[0] != 0 or np.any(np.diff(bounds) < 0):
            raise ValueError(f"{where}: cat_boundaries must rise from 0")
        _lgb_numbers(fields.get("cat_threshold"), int(bounds[-1]), f"{where}: cat_threshold", ints=True)
        t = thr[cat]
        if t.size and (np.any(t != np.floor(t)) or t.min() < 0 or t.max() >= num_cat):
            raise ValueError(f"{where}: a categorical split points outside the {num_cat} category sets")


def check_lightgbm_text(text: str, what: str) -> None:
    """Validate LightGBM model text structurally before LightGBM parses it.

    Checks the header fields LightGBM requires, that the tree sizes match the
    tree blocks, and each tree's counts, array lengths, child indices, split
    features and values (see ``_lgb_tree``).  The trailing feature-importance
    and parameter sections are checked for shape only.
    """
    what = f"{what}: the LightGBM model"
    if "\r" in text or "\0" in text:
        raise ValueError(f"{what} contains carriage returns or NUL characters")
    start = text.find("\nTree=")
    end = text.find("\nend of trees\n")
    if end < 0:
        raise ValueError(f"{what} has no 'end of trees' line; it is truncated or damaged")
    head_text = text[: (start if 0 <= start < end else end) + 1]
    lines = head_text.split("\n")
    if lines[0] != "tree":
        raise ValueError(f"{what} does not start with 'tree'")
    head = {}
    for line in lines[1:]:
        if not line:
            continue
        key, eq, val = line.partition("=")
        if not re.fullmatch(r"[a-z_]+", key) or (not eq and key != "average_output") or key in head:
            raise ValueError(f"{what}: header line {line[:40]!r} is malformed or repeated")
        head[key] = val
    missing = [k for k in _HEADER_REQUIRED if k not in head]
    if missing:
        raise ValueError(f"{what}: the header lacks {missing}")

    def hint(key, lo, hi):
        v = head[key]
        if not re.fullmatch(r"-?\d{1,10}", v) or not lo <= int(v) <= hi:
            raise ValueError(f"{what}: {key} must be an integer in [{lo}, {hi}], got {v!r}")
        return int(v)

    num_class = hint("num_class", 1, 2**20)
    per_iter = hint("num_tree_per_iteration", 1, 2**20)
    if per_iter not in (1, num_class):
        raise ValueError(f"{what}: num_tree_per_iteration {per_iter} fits neither 1 nor num_class {num_class}")
    hint("label_index", -1, 2**31 - 1)
    n_feature = hint("max_feature_idx", -1, 2**31 - 2) + 1
    if not re.fullmatch(r"v\d{1,3}", head["version"]):
        raise ValueError(f"{what}: version {head['version']!r} is not understood")
    if len(head["feature_names"].split(" ")) != n_feature or len(head["feature_infos"].split(" ")) != n_feature:
        raise ValueError(f"{what}: feature_names and feature_infos must list {n_feature} entries")
    if "monotone_constraints" in head:
        _lgb_numbers(head["monotone_constraints"], n_feature, f"{what}: monotone_constraints", ints=True)
    if "objective" in head:
        obj = head["objective"].split(" ")
        if obj[0] not in _OBJECTIVES or not all(re.fullmatch(rf"[a-z_]+:{_NUM}", p) for p in obj[1:]):
            raise ValueError(f"{what}: objective {head['objective']!r} is not one LightGBM knows")
    body = text[start + 1:end + 1] if 0 <= start < end else ""
    blocks = [b for b in re.split(r"(?=^Tree=)", body, flags=re.M) if b]
    if len(blocks) % per_iter:
        raise ValueError(f"{what}: {len(blocks)} trees is not a multiple of {per_iter} trees per iteration")
    if "tree_sizes" in head or blocks:
        sizes = _lgb_numbers(head.get("tree_sizes"), len(blocks), f"{what}: tree_sizes", ints=True)
        if any(int(s) != len(b.encode("utf-8")) for s, b in zip(sizes, blocks)):
            raise ValueError(f"{what}: tree_sizes disagree with the stored trees")
    for i, block in enumerate(blocks):
        blines = block.rstrip("\n").split("\n")
        if blines[0] != f"Tree={i}":
            raise ValueError(f"{what}: tree {i} is labelled {blines[0][:20]!r}")
        fields = {}
        for line in blines[1:]:
            key, eq, val = line.partition("=")
            if not eq or not re.fullmatch(r"[a-z_]+", key) or key in fields:
                raise ValueError(f"{what}: tree {i} line {line[:40]!r} is malformed or repeated")
            fields[key] = val
        _lgb_tree(fields, i, n_feature, what)
    tail = text[end + len("\nend of trees\n"):]
    p0, p1 = tail.find("\nparameters:\n"), tail.find("\nend of parameters\n")
    if (p0 < 0) != (p1 < 0) or p1 < p0:
        raise ValueError(f"{what}: the parameters section is damaged")
    if p0 >= 0:
        for line in tail[p0 + len("\nparameters:\n"):p1].split("\n"):
            if line and not re.fullmatch(r"\[[a-z_0-9]+: [^\[\]\n]*\]", line):
                raise ValueError(f"{what}: parameter line {line[:40]!r} is malformed")
