"""The scikit-learn transformer: scikit-learn's own checks, Pipeline + GridSearchCV, and
agreement with the workspace pipeline's features."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import GridSearchCV, StratifiedKFold
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.utils.estimator_checks import check_estimator
from threadpoolctl import threadpool_limits

from atomline.stages.estimator import SparseCodePooler
from atomline.stages.errors import InputError
from atomline.stages.pool import features_path
from atomline.stages.kernels.prep import Normaliser, PatchGeometry


def test_passes_scikit_learn_estimator_checks():
    # Outside reference: scikit-learn's check_estimator (the full API contract: cloning,
    # get/set_params, fit idempotence, input validation, pickling, n_features_in_, dtype
    # handling, subset invariance, ...). It runs on tiny random data, hence few atoms.
    results = check_estimator(SparseCodePooler(n_atoms=3, n_nonzero=2), on_fail=None)
    failed = [(r["check_name"], repr(r["exception"])) for r in results if r["status"] == "failed"]
    assert failed == []
    assert sum(r["status"] == "passed" for r in results) >= 40


@pytest.fixture(scope="module")
def digits():
    X, y = load_digits(return_X_y=True)
    return X, y


def test_pipeline_under_grid_search(digits):
    X, y = digits
    pipe = Pipeline([("codes", SparseCodePooler(n_atoms=16, record_shape=(8, 8), patch_size=4, stride=2,
                                                regions=1, sample_patches=4000, seed=0)),
                     ("scale", StandardScaler()),
                     ("clf", LogisticRegression(max_iter=1000))])
    grid = GridSearchCV(pipe, {"codes__n_atoms": [8, 24], "codes__regions": [1, 2]},
                        cv=StratifiedKFold(3, shuffle=True, random_state=0))
    with threadpool_limits(1):
        grid.fit(X[:600], y[:600])
    scores = grid.cv_results_["mean_test_score"]
    assert len(scores) == 4 and np.all(scores > 0.5)
    # Grid search refits the best pipeline; its transformer has the chosen parameters.
    best = grid.best_estimator_.named_steps["codes"]
    assert best.n_atoms == grid.best_params_["codes__n_atoms"]
    assert best.transform(X[:5]).shape == (5, 2 * best.regions**2 * best.n_atoms)
    # More atoms and regions carry more information about the digit than 8 atoms pooled
    # over the whole image (a trend of single-layer feature learning; a weak check).
    assert scores[np.argmax(scores)] > scores[0]
    assert grid.score(X[600:900], y[600:900]) > 0.85


def test_feature_names_follow_the_columns(digits):
    X, _ = digits
    est = SparseCodePooler(n_atoms=5, record_shape=(8, 8), patch_size=4, stride=4, regions=2,
                           sample_patches=2000).fit(X[:200])
    names = est.get_feature_names_out()
    assert names.shape == (est.n_features_out_,) == (2 * 4 * 5,)
    assert names[0] == "pos_r0_a0" and names[5] == "pos_r1_a0" and names[20] == "neg_r0_a0"
    Z = est.transform(X[:50])
    # A "neg" column is zero exactly where no negative coefficient occurred: the pooled
    # magnitudes are non-negative everywhere.
    assert Z.min() >= 0 and (Z[:, 20:] > 0).any() and (Z[:, :20] > 0).any()
    unsplit = SparseCodePooler(n_atoms=5, record_shape=(8, 8), patch_size=4, stride=4,
                               split_sign=False, sample_patches=2000).fit(X[:200])
    assert unsplit.get_feature_names_out()[0] == "abs_r0_a0"
    with pytest.raises(InputError, match="record_shape"):
        SparseCodePooler(record_shape=(7, 7)).fit(X[:10])


def test_same_features_as_the_workspace_pipeline(digits_workspace):
    # No second implementation: with the stored dictionary, transform() reproduces the
    # pooled features the encode and pool stages wrote.
    ws, dict_id = digits_workspace
    stored = ws.load_dictionary(dict_id)
    fattrs = ws.output(features_path(dict_id, "digits")).attrs
    est = SparseCodePooler(n_atoms=stored.atoms.shape[0], record_shape=(8, 8), patch_size=4, stride=1,
                           n_nonzero=stored.attrs["coder_options"]["n_nonzero"],
                           regions=fattrs["params"]["regions"])
    est.atoms_ = stored.atoms
    est.normaliser_ = Normaliser.from_stored(stored.attrs["preprocessing"], stored.arrays)
    est.geometry_ = PatchGeometry.from_attrs(stored.attrs["geometry"])
    est.n_features_in_ = 64
    images = ws.records("digits")[:300]
    ours = est.transform(images.reshape(300, 64).astype(np.float32))
    stage = ws.output(features_path(dict_id, "digits")).group["values"][:300]
    np.testing.assert_allclose(ours, stage, rtol=1e-4, atol=1e-5)


def test_fit_learns_the_train_stage_dictionary(digits_workspace):
    # One sampling and one learner: fit() on the records learns, atom for atom, the
    # dictionary the train stage learned from the same records and options (the stage
    # reads them in chunks of 300 rows, fit() holds them in memory).
    from conftest import DIGITS_TRAIN

    ws, dict_id = digits_workspace
    stored = ws.load_dictionary(dict_id)
    est = SparseCodePooler(n_atoms=DIGITS_TRAIN["n_atoms"], record_shape=(8, 8),
                           patch_size=DIGITS_TRAIN["patch_size"], stride=DIGITS_TRAIN["stride"],
                           n_nonzero=DIGITS_TRAIN["coder_options"]["n_nonzero"],
                           sample_patches=DIGITS_TRAIN["sample_patches"], seed=DIGITS_TRAIN["seed"])
    images = ws.records("digits")[:]
    est.fit(images.reshape(images.shape[0], 64))
    np.testing.assert_array_equal(est.atoms_, stored.atoms)
