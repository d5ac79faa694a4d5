"""Reliability: extreme but legal input gives finite answers or clear errors; saved files are
checked whole, signed on request, structurally validated and written atomically."""
from __future__ import annotations

import json
import math
import os
import warnings

import numpy as np
import pytest
from scipy import special, stats

import lossfam
from lossfam import _filecheck, _modelfile, diagnostics
from lossfam.families.gamma import _log_minus_digamma

FAMILIES = lossfam.available(scores="one")


def _y_for(name, n=40, seed=0):
    rng = np.random.default_rng(seed)
    if name == "bernoulli":
        return (rng.random(n) < 0.4).astype(float)
    if name == "poisson":
        return rng.poisson(3.0, n).astype(float)
    if name == "gamma":
        return rng.gamma(2.0, 1.5, n)
    # any other family: targets inside its support, drawn from its own law at raw score 0.3
    law = lossfam.family(name).distribution(np.full(n, 0.3))
    return np.asarray(law.rvs(random_state=rng), dtype=float)


@pytest.fixture
def strict_warnings():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        yield


# --------------------------------------------------------------------------- families: scalars
@pytest.mark.parametrize("name", FAMILIES)
@pytest.mark.parametrize("weight", [None, 2.5])
def test_grad_hess_accepts_scalars_like_nll(name, weight):
    fam = lossfam.family(name)
    ys = _y_for(name)
    y = float(ys[ys != 0][0])  # a positive draw: zero takes a separate branch in tweedie and the counts
    g, h = fam.grad_hess(y, 0.3, weight=weight)
    assert np.ndim(g) == 0 and np.ndim(h) == 0
    ga, ha = fam.grad_hess([y], [0.3], weight=None if weight is None else [weight])
    assert g == ga[0] and h == ha[0]
    assert np.ndim(fam.nll(y, 0.3)) == 0


# --------------------------------------------------------------------------- families: baselines
def test_bernoulli_baseline_with_huge_offsets_returns(strict_warnings):
    fam = lossfam.family("bernoulli")
    # equal offsets: the answer is logit(2/3) - 2e16, which rounds to -2e16
    assert fam.baseline([0, 1, 1], offset=[2e16] * 3) == -2e16
    c = fam.baseline([0, 1, 1], offset=[2e16, 0.0, 1.0])
    assert math.isfinite(c)
    # mixed offsets: the baseline solves sum expit(c + o) = sum y
    c = fam.baseline([0, 1, 1, 0], offset=[0.0, 1.0, -2.0, 0.5])
    assert special.expit(c + np.array([0.0, 1.0, -2.0, 0.5])).sum() == pytest.approx(2.0, abs=1e-12)


def test_poisson_baseline_absorbs_large_offsets(strict_warnings):
    fam = lossfam.family("poisson")
    # log(sum y / sum e^o) = log(3/2) + 800, computed in log space
    assert fam.baseline([1.0, 2.0], offset=[-800.0] * 2) == pytest.approx(800.0 + math.log(1.5), rel=1e-15)
    assert fam.baseline([1.0, 2.0], offset=[800.0] * 2) == pytest.approx(-800.0 + math.log(1.5), rel=1e-15)


@pytest.mark.parametrize("name", FAMILIES)
@pytest.mark.parametrize("scale", [1e308, 1e-310])
def test_only_relative_weights_matter_in_baseline_and_nuisance(name, scale, strict_warnings):
    fam = lossfam.family(name)
    y = _y_for(name)
    w = np.linspace(1.0, 1.7, y.size)
    assert fam.baseline(y, weight=w * scale) == pytest.approx(fam.baseline(y, weight=w), rel=1e-12, abs=1e-12)
    if fam.params:
        raw = np.full(y.size, fam.baseline(y))
        want = fam.fit_nuisance(y, raw, weight=w).params
        got = fam.fit_nuisance(y, raw, weight=w * scale).params
        for k in want:
            assert got[k] == pytest.approx(want[k], rel=1e-9)


# --------------------------------------------------------------------------- families: gamma shape
def test_gamma_shape_equation_is_accurate_for_large_shapes():
    # log k - digamma(k): compare with mpmath at 50 digits when it is installed
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 50
    for k in [0.01, 1.0, 15.9, 16.0, 1e3, 1e8, 1e14, 1e20]:
        ref = float(mpmath.log(k) - mpmath.digamma(k))
        assert _log_minus_digamma(k) == pytest.approx(ref, rel=1e-13)


@pytest.mark.parametrize("cv", [1e-3, 1e-6, 1e-8])
def test_gamma_shape_fit_tracks_tiny_coefficients_of_variation(cv):
    # with the mean known, the shape MLE scales like 1/cv^2; its sampling spread is sqrt(2/n) ~ 1.4%
    k = cv**-2
    rng = np.random.default_rng(3)
    y = 5.0 * rng.gamma(k, 1.0 / k, size=10_000)
    fitted = lossfam.family("gamma").fit_nuisance(y, np.full(y.size, math.log(5.0))).shape
    assert fitted / k == pytest.approx(1.0, abs=0.06)


def test_gamma_shape_fit_names_rows_where_y_over_mu_overflows(strict_warnings):
    with pytest.raises(ValueError, match=r"overflows in 1 row, e.g. row \[0\] = \[-710.0\]"):
        lossfam.family("gamma").fit_nuisance([1.0, 2.0], [-710.0, 0.0])


# --------------------------------------------------------------------------- families: extreme values
@pytest.mark.parametrize("name, y, raw, params", [
    ("poisson", 2.0, 1e308, {}),
    ("poisson", 1e308, 3.7, {}),
    ("gamma", 1.0, -1e308, {"shape": 2.0}),
    ("gamma", 5e-324, -709.8, {"shape": 0.3}),
])
def test_nll_at_extreme_legal_inputs_is_never_nan(name, y, raw, params, strict_warnings):
    out = lossfam.family(name, **params).nll([y], [raw])
    assert not np.isnan(out).any()
    assert out[0] > 0 or math.isfinite(out[0])


def test_gamma_nll_with_tiny_target_matches_scipy():
    # y = 5e-324 (the smallest subnormal) with e^-raw near overflow: the product is ~1e-15
    fam = lossfam.family("gamma", shape=0.3)
    raw = -709.7
    ref = -stats.gamma(a=0.3, scale=math.exp(raw) / 0.3).logpdf(5e-324)
    assert fam.nll([5e-324], [raw])[0] == pytest.approx(ref, rel=1e-12)


def test_poisson_nll_far_out_matches_stirling():
    # y = 1e300 at its own mean: nll = lgamma(y + 1) - y log y + y = 0.5 log(2 pi y) + O(1/y)
    y = 1e300
    assert lossfam.family("poisson").nll([y], [math.log(y)])[0] == pytest.approx(0.5 * math.log(2 * math.pi * y), rel=1e-12)


def test_gaussian_hessian_overflows_to_inf_not_an_exception(strict_warnings):
    g, h = lossfam.family("gaussian", scale=1e-200).grad_hess([1.0], [0.0])
    assert h[0] == np.inf and g[0] == -np.inf


def test_huber_deviance_with_huge_scale_is_the_squared_residual(strict_warnings):
    assert lossfam.family("huber", scale=1e160).deviance([3.0], [1.0])[0] == 4.0


@pytest.mark.parametrize("bad, what", [
    (np.array([1.0 + 2.0j, 2.0]), "complex numbers"),
    (np.array(["2024-01-01", "2024-01-02"], dtype="datetime64[D]"), "dates"),
    (np.array([1, 2], dtype="timedelta64[s]"), "time spans"),
])
def test_complex_and_date_targets_are_refused(bad, what):
    with pytest.raises(ValueError, match=f"y must be real numbers, got {what}"):
        lossfam.family("gaussian").nll(bad, np.zeros(2))


def test_two_dimensional_targets_are_refused_with_their_shape():
    with pytest.raises(ValueError, match=r"one-dimensional.*\(3, 1\); for one column use y.ravel\(\)"):
        lossfam.family("gaussian").baseline(np.ones((3, 1)))


# --------------------------------------------------------------------------- diagnostics
def test_laplace_interval_probability_is_finite_far_in_the_tails(strict_warnings):
    # exact: P(-1/2 < Y <= 1/2) for Laplace(800, 1) = (e^-799.5 - e^-800.5) / 2
    want = -799.5 + math.log((1.0 - math.exp(-1.0)) / 2.0)
    assert diagnostics.log_interval_probability("laplace", [0.0], [800.0])[0] == pytest.approx(want, rel=1e-14)
    # same law as asymmetric_laplace at tau = 1/2 with half the scale (module docstrings)
    al = diagnostics.log_interval_probability(lossfam.family("asymmetric_laplace", scale=0.5), [0.0], [800.0])
    assert al[0] == pytest.approx(want, rel=1e-3)


def test_laplace_law_matches_scipy_where_scipy_is_finite():
    law = lossfam.family("laplace", scale=1.7).distribution(np.array([0.3, -2.0, 5.0]))
    ref = stats.laplace(loc=[0.3, -2.0, 5.0], scale=1.7)
    x = np.array([1.0, -3.0, 40.0])
    for method in ("pdf", "logpdf", "cdf", "sf", "logcdf", "logsf"):
        assert np.allclose(getattr(law, method)(x), getattr(ref, method)(x), rtol=1e-13, atol=0), method
    assert np.allclose(law.ppf([0.1, 0.5, 0.9]), ref.ppf([0.1, 0.5, 0.9]), rtol=1e-13)


def test_ranking_laplace_with_one_integer_outlier_stays_finite(strict_warnings):
    rng = np.random.default_rng(5)
    y = rng.poisson(10.0, 60).astype(float)
    y[7] = 2000.0
    X = rng.normal(size=(60, 2))
    table = lossfam.rank_families(X, y, families=["laplace", "poisson"], folds=3, as_frame=False)
    rows = table if isinstance(table, list) else table["rows"] if isinstance(table, dict) else table
    text = repr(rows)
    assert "nan" not in text.lower() and "inf" not in text.lower()


# --------------------------------------------------------------------------- saved files
def _write(path, **kw):
    args = dict(engine="lightgbm", family=lossfam.family("gaussian", scale=1.5), baseline=0.25,
                model=_lgb_text(), extra={"fitted_params": {"scale": 1.5}})
    args.update(kw)
    _modelfile.write_model_file(path, **args)


def _lgb_text(tree=None):
    tree = _TREE if tree is None else tree
    return (
        "tree\nversion=v4\nnum_class=1\nnum_tree_per_iteration=1\nlabel_index=0\nmax_feature_idx=1\n"
        "objective=custom\nfeature_names=a b\nfeature_infos=[0:1] [0:1]\ntree_sizes={size}\n\n{tree}"
        "end of trees\n\nfeature_importances:\na=1\n\nparameters:\n[boosting: gbdt]\nend of parameters\n\n"
        "pandas_categorical:null\n"
    ).replace("{size}", str(len(tree))).replace("{tree}", tree)


_TREE = ("Tree=0\nnum_leaves=2\nnum_cat=0\nsplit_feature=1\nsplit_gain=1\nthreshold=0.5\ndecision_type=2\n"
         "left_child=-1\nright_child=-2\nleaf_value=0.1 -0.2\nleaf_weight=5 5\nleaf_count=5 5\n"
         "internal_value=0\ninternal_weight=10\ninternal_count=10\nis_linear=0\nshrinkage=1\n\n\n")


def _edit(path, change):
    doc = json.loads(open(path).read())
    change(doc)
    return doc


def test_model_file_round_trips_and_records_its_checksum(tmp_path):
    p = tmp_path / "m.json"
    _write(p)
    doc = _modelfile.read_model_file(p)
    assert doc["family"] == lossfam.family("gaussian", scale=1.5) and doc["baseline"] == 0.25
    raw = json.loads(p.read_text())
    assert raw["lossfam_model"] == _modelfile.FORMAT_VERSION == 2
    assert raw["integrity"]["algorithm"] == "sha256"


@pytest.mark.parametrize("field, value", [
    ("baseline", 0.5),
    ("family", {"name": "laplace", "params": {"scale": 1.5}}),
    ("family", {"name": "gaussian", "params": {"scale": 3.0}}),
    ("extra", {"fitted_params": {"scale": 2.0}}),
    ("extra", {}),
])
def test_any_edit_of_the_document_fails_its_checksum(tmp_path, field, value):
    p = tmp_path / "m.json"
    _write(p)
    doc = _edit(p, lambda d: d.__setitem__(field, value))
    p.write_text(json.dumps(doc))
    with pytest.raises(ValueError, match="does not match its checksum"):
        _modelfile.read_model_file(p)


def test_duplicate_keys_are_refused(tmp_path):
    p = tmp_path / "m.json"
    _write(p)
    text = p.read_text().replace('"baseline": 0.25', '"baseline": 0.25, "baseline": 9.0')
    p.write_text(text)
    with pytest.raises(ValueError, match="'baseline' appears twice"):
        _modelfile.read_model_file(p)


@pytest.mark.parametrize("extra", [[1, 2], None, "text", 3])
def test_extra_of_the_wrong_type_is_refused_even_with_a_valid_checksum(tmp_path, extra):
    p = tmp_path / "m.json"
    _write(p)
    doc = _filecheck.reseal(_edit(p, lambda d: d.__setitem__("extra", extra)))
    p.write_text(json.dumps(doc))
    with pytest.raises(ValueError, match="'extra' must be an object"):
        _modelfile.read_model_file(p)


@pytest.mark.parametrize("field, value, match", [
    ("baseline", True, "not a finite number"),
    ("baseline", "0.25", "not a finite number"),
    ("family", {"name": "gaussian"}, "family entry"),
    ("family", {"name": "gaussian", "params": {"scale": "1.5"}}, "finite numbers"),
    ("family", {"name": "gaussian", "params": {"scale": -1.0}}, "not usable"),
    ("engine", "sklearn", "unknown engine"),
    ("model", "", "missing or empty"),
])
def test_every_field_is_type_checked(tmp_path, field, value, match):
    p = tmp_path / "m.json"
    _write(p)
    doc = _filecheck.reseal(_edit(p, lambda d: d.__setitem__(field, value)))
    p.write_text(json.dumps(doc))
    with pytest.raises(ValueError, match=match):
        _modelfile.read_model_file(p)


def test_deeply_nested_json_is_a_value_error_not_a_recursion_error(tmp_path):
    p = tmp_path / "deep.json"
    p.write_text('{"lossfam_model": 2, "extra": ' + "[" * 100_000 + "]" * 100_000 + "}")
    with pytest.raises(ValueError, match="nested 100001 levels deep"):
        _modelfile.read_model_file(p)


def test_nan_constants_are_not_json(tmp_path):
    p = tmp_path / "m.json"
    _write(p)
    p.write_text(p.read_text().replace('"baseline": 0.25', '"baseline": NaN'))
    with pytest.raises(ValueError, match="NaN is not a JSON number"):
        _modelfile.read_model_file(p)


def test_signed_files_need_their_key(tmp_path):
    p = tmp_path / "m.json"
    _write(p, key=b"team secret")
    assert _modelfile.read_model_file(p, key=b"team secret")["baseline"] == 0.25
    assert _modelfile.read_model_file(p, key="team secret")["baseline"] == 0.25  # str keys are UTF-8
    with pytest.raises(ValueError, match="the file is signed; pass the key"):
        _modelfile.read_model_file(p)
    with pytest.raises(ValueError, match="signature does not match"):
        _modelfile.read_model_file(p, key=b"guess")
    # an edit re-sealed with a plain checksum (what anyone can compute) is refused when a key is expected
    doc = _filecheck.reseal(_edit(p, lambda d: d.__setitem__("baseline", 9.0)))
    p.write_text(json.dumps(doc))
    with pytest.raises(ValueError, match="not signed"):
        _modelfile.read_model_file(p, key=b"team secret")


def test_engine_none_accepts_either_engine_and_a_named_engine_checks_it(tmp_path):
    p = tmp_path / "m.json"
    _write(p)
    assert _modelfile.read_model_file(p, engine=None)["engine"] == "lightgbm"
    with pytest.raises(ValueError, match="lossfam.lightgbm.load"):
        _modelfile.read_model_file(p, engine="xgboost")


def test_old_format_files_are_refused_with_a_reason(tmp_path):
    p = tmp_path / "old.json"
    p.write_text(json.dumps({"lossfam_model": 1, "engine": "lightgbm"}))
    with pytest.raises(ValueError, match="format 1 files carry no integrity check"):
        _modelfile.read_model_file(p)


# --------------------------------------------------------------------------- atomic saves
def test_save_replaces_the_file_and_leaves_no_other_file(tmp_path):
    p = tmp_path / "m.json"
    neighbour = tmp_path / "m.json.tmp"
    neighbour.write_text("someone else's file")
    p.write_text("old")
    _write(p)
    assert sorted(os.listdir(tmp_path)) == ["m.json", "m.json.tmp"]
    assert neighbour.read_text() == "someone else's file"
    assert _modelfile.read_model_file(p)["baseline"] == 0.25
    mode = os.stat(p).st_mode & 0o777
    umask = os.umask(0)
    os.umask(umask)
    assert mode == 0o666 & ~umask


def test_save_into_a_folder_path_is_a_clear_error_and_leaves_nothing(tmp_path):
    with pytest.raises(IsADirectoryError, match="is a folder; give the model a file name"):
        _write(tmp_path)
    assert os.listdir(tmp_path) == []


def test_failed_save_keeps_the_old_file_and_removes_its_temporary(tmp_path):
    p = tmp_path / "m.json"
    _write(p)
    before = p.read_bytes()
    with pytest.raises(ValueError):
        _write(p, baseline=float("nan"))
    with pytest.raises(TypeError):
        _write(p, extra={"fitted_params": {"scale": object()}})
    assert p.read_bytes() == before and os.listdir(tmp_path) == ["m.json"]


def test_save_into_a_missing_folder_says_so(tmp_path):
    with pytest.raises(FileNotFoundError, match="does not exist"):
        _write(tmp_path / "nope" / "m.json")


# --------------------------------------------------------------------------- engine model checks
def test_lightgbm_text_checks_accept_a_valid_model():
    _filecheck.check_lightgbm_text(_lgb_text(), "m")


@pytest.mark.parametrize("old, new, match", [
    ("split_feature=1", "split_feature=2", "feature outside"),
    ("left_child=-1", "left_child=-3", "child index"),
    ("left_child=-1", "left_child=0", "child index"),
    ("num_leaves=2", "num_leaves=3", "leaf_value"),
    ("leaf_value=0.1 -0.2", "leaf_value=0.1 nan", "numbers"),
    ("max_feature_idx=1", "max_feature_idx=5", "feature_names"),
    ("num_class=1", "num_class=x", "num_class"),
    ("objective=custom", "objective=regressiom", "objective"),
    ("Tree=0", "Tree=1", "labelled"),
    ("decision_type=2", "decision_type=3", "cat_boundaries"),
    ("end of trees", "end of tree", "end of trees"),
])
def test_lightgbm_text_checks_refuse_what_would_abort_or_misread(old, new, match):
    # edits inside the tree keep tree_sizes consistent, so the check under test is the one that fires
    text = _lgb_text(_TREE.replace(old, new, 1)) if old in _TREE else _lgb_text().replace(old, new, 1)
    assert text != _lgb_text()
    with pytest.raises(ValueError, match=match):
        _filecheck.check_lightgbm_text(text, "m")


def test_lightgbm_tree_sizes_must_match_the_blocks():
    text = _lgb_text().replace(f"tree_sizes={len(_TREE)}", f"tree_sizes={len(_TREE) + 1}")
    with pytest.raises(ValueError, match="tree_sizes disagree"):
        _filecheck.check_lightgbm_text(text, "m")


def _xgb_doc():
    xgb = pytest.importorskip("xgboost")
    rng = np.random.default_rng(0)
    bst = xgb.train({"nthread": 1, "max_depth": 2}, xgb.DMatrix(rng.normal(size=(60, 3)), rng.normal(size=60)), 2)
    return json.loads(bytes(bst.save_raw("json")))


def _tree(doc, i=0):
    return doc["learner"]["gradient_booster"]["model"]["trees"][i]


@pytest.mark.parametrize("edit, match", [
    (lambda d: _tree(d, 1).__setitem__("id", 15), "id 15"),
    (lambda d: _tree(d)["left_children"].__setitem__(0, 40), "child index"),
    (lambda d: _tree(d)["left_children"].__setitem__(0, 0), "child index"),
    (lambda d: _tree(d)["right_children"].__setitem__(0, _tree(d)["left_children"][0]), "child of two"),
    (lambda d: _tree(d)["split_indices"].__setitem__(0, 3), "feature outside"),
    (lambda d: _tree(d)["split_conditions"].pop(), "split_conditions"),
    (lambda d: _tree(d)["tree_param"].__setitem__("num_nodes", "9"), "left_children"),
    (lambda d: _tree(d)["base_weights"].__setitem__(0, 1e39), "single precision"),
    (lambda d: d["learner"]["gradient_booster"]["model"]["trees"].pop(), "num_trees"),
    (lambda d: d["learner"]["gradient_booster"]["model"]["tree_info"].__setitem__(0, 4), "tree_info"),
    (lambda d: d["learner"]["learner_model_param"].__setitem__("num_feature", "2"), "num_feature"),
    (lambda d: d["learner"]["learner_model_param"].__setitem__("base_score", "[nan]"), "base_score"),
])
def test_xgboost_json_checks_refuse_what_would_crash_or_misread(edit, match):
    doc = _xgb_doc()
    _filecheck.check_xgboost_json(json.dumps(doc), "m")  # the untouched model passes
    edit(doc)
    with pytest.raises(ValueError, match=match):
        _filecheck.check_xgboost_json(json.dumps(doc), "m")


@pytest.mark.parametrize("engine", ["lightgbm", "xgboost"])
def test_signed_model_round_trip_through_the_engines(engine, tmp_path):
    pytest.importorskip(engine)
    rng = np.random.default_rng(1)
    X, y = rng.normal(size=(80, 2)), rng.poisson(2.0, 80).astype(float)
    if engine == "lightgbm":
        import lightgbm as lgb
        import lossfam.lightgbm as adapter

        model = adapter.train("poisson", {"num_threads": 1, "verbose": -1, "min_data_in_leaf": 5},
                              lgb.Dataset(X, y), 3)
    else:
        import xgboost as xgb
        import lossfam.xgboost as adapter

        model = adapter.train("poisson", {"nthread": 1}, xgb.DMatrix(X, y), 3)
    p = tmp_path / "m.json"
    model.save(p, key="k1")
    assert np.array_equal(adapter.load(p, key="k1").predict(X), model.predict(X))
    with pytest.raises(ValueError, match="signed"):
        adapter.load(p)


def test_numpy_values_in_extra_are_saved_as_plain_json(tmp_path):
    p = tmp_path / "m.json"
    _write(p, extra={"fitted_params": {"scale": np.float64(1.5)}, "best_iteration": np.int64(3),
                     "flags": np.array([True, False])})
    assert _modelfile.read_model_file(p)["extra"] == {"fitted_params": {"scale": 1.5}, "best_iteration": 3,
                                                      "flags": [True, False]}
    with pytest.raises(ValueError, match="not finite"):
        _write(p, extra={"best_score": float("nan")})


@pytest.mark.parametrize("params", [
    {"linear_tree": True, "num_leaves": 3},
    {"objective": "quantile", "alpha": 0.3},
    {"objective": "binary"},
    {"objective": "tweedie"},
    {"objective": "multiclass", "num_class": 3},
    {"categorical": True},
])
def test_lightgbm_text_checks_accept_models_of_every_kind(params):
    lgb = pytest.importorskip("lightgbm")
    rng = np.random.default_rng(0)
    X = rng.normal(size=(400, 3))
    y = 3.0 * X[:, 0] + X[:, 1] + rng.normal(size=400)
    params = dict(params, verbose=-1, num_threads=1, min_data_in_leaf=5)
    cat = params.pop("categorical", False)
    if cat:
        X[:, 2] = rng.integers(0, 6, 400)
        y = y + 3.0 * (X[:, 2] % 2)
        params.update(min_data_per_group=5, cat_smooth=1.0)
    if params.get("objective") == "binary":
        y = (y > 0).astype(float)
    elif params.get("objective") == "tweedie":
        y = np.abs(y)
    elif params.get("objective") == "multiclass":
        y = rng.integers(0, 3, 400)
    data = lgb.Dataset(X, y, categorical_feature=[2] if cat else "auto")
    text = lgb.train(params, data, 3).model_to_string()
    assert ("cat_boundaries=" in text) == cat
    _filecheck.check_lightgbm_text(text, "m")


@pytest.mark.parametrize("params", [
    {"booster": "dart"},
    {"booster": "gblinear"},
    {"num_parallel_tree": 3, "subsample": 0.5},
    {"objective": "multi:softprob", "num_class": 3},
    {"multi_strategy": "multi_output_tree"},
    {"categorical": True},
])
def test_xgboost_json_checks_accept_models_of_every_kind(params):
    xgb = pytest.importorskip("xgboost")
    pd = pytest.importorskip("pandas")
    rng = np.random.default_rng(0)
    X = rng.normal(size=(400, 3))
    y = 3.0 * X[:, 0] + rng.normal(size=400)
    params = dict(params, nthread=1)
    if params.pop("categorical", False):
        frame = pd.DataFrame({"a": X[:, 0], "c": pd.Categorical(rng.integers(0, 5, 400))})
        data = xgb.DMatrix(frame, y + frame["c"].cat.codes, enable_categorical=True)
    elif "num_class" in params:
        data = xgb.DMatrix(X, rng.integers(0, 3, 400))
    elif "multi_strategy" in params:
        data = xgb.DMatrix(X, np.c_[y, -y])
    else:
        data = xgb.DMatrix(X, y)
    booster = xgb.train(params, data, 3)
    _filecheck.check_xgboost_json(bytes(booster.save_raw("json")).decode(), "m")


# --------------------------------------------------------------------------- cases found by the property fuzz
def test_gamma_shape_for_enormous_variation_is_tiny_not_an_error(strict_warnings):
    # y / mu near 1e308: s = mean(y/mu - 1 - log(y/mu)) ~ 6e307, and 1/k = s - euler_gamma - log k
    y = np.array([2.0e307, 7.3e307, 8.6e307])
    k = lossfam.family("gamma").fit_nuisance(y, np.zeros(3)).shape
    s = np.mean(y / 1e307) * 1e307  # every log term is negligible at this size
    assert k == pytest.approx(1.0 / (s - np.euler_gamma - math.log(1.0 / s)), rel=1e-12)


def test_huber_deviance_keeps_tiny_tail_values(strict_warnings):
    # 2 d s |r| - (d s)^2 with d s = 1.7e-475 (below float64) and |r| = 9e307: 3.0e-167
    d, s, r = 7.923501896920403e-181, 2.109817920161356e-295, 8.98846567e307
    out = lossfam.family("huber", delta=d, scale=s).deviance([r], [0.0])[0]
    assert out == pytest.approx(2.0 * d * (s * r), rel=1e-12)


def test_huber_baseline_is_located_to_the_scale_not_to_the_widest_target(strict_warnings):
    # four zeros, one huge target and one huge negative: the Huber M-estimate is 0
    c = lossfam.family("huber").baseline([0.0, 0, 0, 0, 1.79769313e308, 0], offset=[0, 0, 0, 0, 0, 9.97920155e291])
    assert abs(c) < 1e-12


def test_bernoulli_baseline_with_offsets_spanning_the_float_range_returns_a_root(strict_warnings):
    y = np.array([0.0, 0, 0, 0, 1])
    o = np.array([0.0, 0, 0, 0, 1.79769313e308])
    c = lossfam.family("bernoulli").baseline(y, offset=o)
    assert special.expit(c + o).sum() == 1.0


@pytest.mark.parametrize("field", ["extra", "baseline", "family", "model", "engine"])
def test_a_missing_field_is_refused_even_with_a_valid_checksum(tmp_path, field):
    # deleting 'extra' must not silently reset the fitted parameters to their defaults
    p = tmp_path / "m.json"
    _write(p)
    doc = _filecheck.reseal(_edit(p, lambda d: d.pop(field)))
    p.write_text(json.dumps(doc))
    with pytest.raises(ValueError, match=f"lacks \\['{field}'\\]"):
        _modelfile.read_model_file(p)
