"""The reports put the best baseline dictionary beside the raw records: CLI text, markdown,
the demo's headline, and the nightly command's gate flags (no Prefect server)."""

from __future__ import annotations

import numpy as np

from atomline.flows.artifacts import baseline_summary, summary_markdown
from atomline.flows.cli.commands import _nightly_groups
from atomline.flows.cli.parser import _parser
from atomline.flows.cli.reports import _describe_demo, _describe_evaluation
from atomline.stages.kernels.scoring import paired_bootstrap, scores_from_confusion, confusion

N = 64
Y = np.arange(N) % 2


def _wrong_on(count: int) -> np.ndarray:
    pred = Y.copy()
    pred[:count] = 1 - pred[:count]
    return pred


def _manifest(wrong: dict[str, int]) -> dict:
    """An evaluation manifest from hand-made predictions: the scores by the scoring kernel,
    ``versus`` by the paired bootstrap the evaluate stage uses."""
    preds = {name: _wrong_on(n) for name, n in wrong.items()}
    manifest = {"run_id": "ev-1", "dict_id": "d-1", "n_rows": N, "folds": 5, "coder": "omp",
                "pooling": {"regions": 4}, "learning_curve": {
                    "shares": [0.5, 1.0], "train_rows": [25.0, 51.0],
                    **{name: [0.5, 1 - n / N] for name, n in wrong.items()}}}
    for name, pred in preds.items():
        manifest[name] = scores_from_confusion(confusion(Y, pred, 2))
    manifest["versus"] = {name: paired_bootstrap(Y, preds["features"], pred, 2, n_boot=300)
                          for name, pred in preds.items() if name != "features"}
    return manifest


def test_a_simpler_dictionary_doing_better_shows_in_text_and_markdown():
    # PCA right on 62 of 64 rows, the learned features on 56, raw on 40 (accuracy by hand).
    ev = _manifest({"features": 8, "raw": 24, "random_patches": 20, "pca": 2})
    line = baseline_summary(ev)
    assert line == ("Best baseline dictionary: pca 0.969 beside raw records 0.625; sparse features "
                    "0.875 — a simpler dictionary does as well or better")
    assert line in _describe_evaluation(ev)
    md = summary_markdown(ev, title="t")
    assert line + "." in md
    # The learning curve's table holds the best baseline's column beside raw.
    assert "| rows | features | raw | pca |" in md and "| 51 | 0.875 | 0.625 | 0.969 |" in md
    better = _manifest({"features": 1, "raw": 24, "random_patches": 20, "pca": 6})
    assert baseline_summary(better).endswith("sparse features 0.984")
    assert baseline_summary(_manifest({"features": 1, "raw": 3})) is None


def test_the_demo_headline_is_against_the_best_baseline_and_says_what_it_is_not():
    cand = _manifest({"features": 4, "raw": 30, "random_patches": 12, "pca": 8})
    report = {"dictionary": {"n_atoms": 128, "n_features": 64, "method": "online", "coder": "omp",
                             "coder_options": {"n_nonzero": 3}, "coherence": 0.5,
                             "geometry": {"record_shape": [2048], "size": [64], "stride": [32]}},
              "candidate": cand, "candidate_id": "d-1", "promoted_id": "d-1", "outcome": "first",
              "encode": {"records": 4000, "seconds": 10.0, "skipped": 0}, "classes": ["a", "b"],
              "workspace": "/tmp/ws", "seconds": 20.0}
    text = _describe_demo(report)
    d = cand["versus"]["pca"]["accuracy"]
    # 60/64 against PCA's 56/64: +6.2 points; raw is shown on the next line, not in the headline.
    assert (f"sparse features 0.938 against the best baseline dictionary (pca) 0.875: "
            f"{100 * d['difference']:+.1f} points") in text and "+6.2 points" in text
    assert "raw samples 0.531" in text
    assert "screening aid" in text and "not a maintenance or safety decision" in text


def test_the_nightly_command_takes_the_gate_flags_from_the_declaration():
    args = _parser().parse_args(["nightly", "ws.zarr", "vib", "--beat-baselines", "--tolerance", "0.02"])
    gate = _nightly_groups(args)["gate"]
    assert gate.beat_baselines is True and gate.tolerance == 0.02 and gate.retrain == "always"
    plain = _nightly_groups(_parser().parse_args(["nightly", "ws.zarr", "vib"]))["gate"]
    assert plain.beat_baselines is False and plain.metric == "accuracy"
