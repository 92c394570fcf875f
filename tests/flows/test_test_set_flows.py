"""The flows score a named test set: they encode and pool it like the records, then evaluate."""

from __future__ import annotations

import uuid

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from threadpoolctl import threadpool_limits

from atomline.flows import evaluate_flow
from atomline.flows.cli import main
from atomline.stages import encode, pool, train
from atomline.stages.errors import InputError
from atomline.stages.options import EvaluateOptions, PoolOptions, ReportOptions, TrainOptions
from atomline.stages.workspace import Workspace

pytestmark = pytest.mark.usefixtures("prefect_harness")

#: A fixed split of ours of scikit-learn's digits: the first 1,000 rows train, the rest test.
N_TRAIN = 1000


@pytest.fixture(scope="module")
def digits_split():
    """scikit-learn's bundled digits (open data, 1797 images of 8×8): the training rows
    encoded and pooled by the stages; the test rows only added."""
    digits = load_digits()
    images = digits.images.astype(np.float32)
    url = f"memory://test-set-flows-{uuid.uuid4().hex}"
    ws = Workspace.open(url, create=True)
    for name, part in (("digits_train", slice(0, N_TRAIN)), ("digits_test", slice(N_TRAIN, None))):
        ws.add_records(name, images[part], chunk_rows=250)
        ws.add_labels(name, digits.target[part])
    dict_id = train.train_dictionary(ws, "digits_train", TrainOptions(
        n_atoms=32, patch_size=4, stride=2, sample_patches=5000, coder_options={"n_nonzero": 3}))["dict_id"]
    encode.encode_chunks(ws, "digits_train", dict_id,
                         encode.prepare_encode(ws, "digits_train", dict_id)["pending"])
    pooling = PoolOptions(regions=2, reduce="mean")  # not the default: the flow must copy it
    pool.pool_chunks(ws, "digits_train", dict_id,
                     pool.prepare_pool(ws, "digits_train", dict_id, pooling)["pending"], pooling)
    return url, dict_id


def test_evaluate_flow_encodes_pools_and_scores_the_test_set(digits_split, capsys):
    url, dict_id = digits_split
    ws = Workspace.open(url)
    assert not ws.has_output(f"features/{dict_id}/digits_test")
    options = EvaluateOptions(split="test-set", test_records="digits_test", baselines=(),
                              learning_curve=(), n_boot=200)
    ev = evaluate_flow(url, "digits_train", dict_id=dict_id, evaluate=options,
                       report=ReportOptions(pictures=False))
    test_out = ws.output(f"features/{dict_id}/digits_test")
    assert test_out.complete and test_out.attrs["params"] == ws.output(
        f"features/{dict_id}/digits_train").attrs["params"]
    assert test_out.attrs["params"]["reduce"] == "mean"
    assert ev["split"] == "test-set" and ev["n_rows"] == 797 and ev["n_train"] == N_TRAIN
    # Reference: scikit-learn's standardised LogisticRegression fitted by hand on the
    # stored training features, scoring the stored test features.
    X = ws.output(f"features/{dict_id}/digits_train").group["values"][:]
    X_test = test_out.group["values"][:]
    model = make_pipeline(StandardScaler(), LogisticRegression(C=1.0, max_iter=2000, random_state=0))
    with threadpool_limits(1):
        ref = model.fit(X, ws.labels("digits_train")).predict(X_test)
    assert ev["features"]["accuracy"] == pytest.approx(np.mean(ref == ws.labels("digits_test")), abs=1e-12)
    # The command line takes the split through the options' flags and finds the same evaluation.
    capsys.readouterr()
    assert main(["evaluate", url, "digits_train", "--dictionary", dict_id, "--split", "test-set",
                 "--test-records", "digits_test", "--baselines", "--curve", "--n-boot", "200",
                 "--no-pictures", "--json"]) == 0
    assert ev["run_id"] in capsys.readouterr().out


def test_evaluate_flow_refuses_a_test_set_of_another_shape_before_encoding(digits_split):
    url, dict_id = digits_split
    ws = Workspace.open(url)
    ws.add_records("small", np.zeros((40, 4, 4), np.float32), chunk_rows=40)
    ws.add_labels("small", np.arange(40) % 4)
    with pytest.raises(InputError, match=r"test records 'small'.*\(8, 8\).*\(4, 4\)"):
        evaluate_flow(url, "digits_train", dict_id=dict_id,
                      evaluate=EvaluateOptions(split="test-set", test_records="small"),
                      report=ReportOptions(pictures=False))
    assert not ws.has_output(f"codes/{dict_id}/small")
