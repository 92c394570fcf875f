"""The train stage (and its options and preflight) with every coder and no coder options: each coder's own defaults."""

from __future__ import annotations

import pytest

from atomline.flows.preflight import check_train
from atomline.stages import train
from atomline.stages.errors import InputError
from atomline.stages.kernels import coding
from atomline.stages.options import TrainOptions
from atomline.stages.workspace import Workspace

SMALL = dict(n_atoms=8, patch_size=32, stride=32, sample_patches=500, seed=2,
             learner_options={"batch_size": 250})


@pytest.mark.parametrize("coder", sorted(coding.METHODS))
def test_train_with_any_coder_and_no_options_uses_that_coders_defaults(labelled, coder):
    # Before, {"n_nonzero": 5} went to every coder: lars/ista/fista/threshold/... failed
    # with "unexpected keyword n_nonzero".
    ws = Workspace.open(labelled)
    if not coding.METHODS[coder].in_learner:
        with pytest.raises(InputError, match="train_encoder"):
            check_train(labelled, "vib", method="online", coder=coder, coder_options=None,
                        **{k: SMALL[k] for k in ("n_atoms", "patch_size", "stride",
                                                 "sample_patches")})
        with pytest.raises(InputError, match="train_encoder"):  # refused when made
            TrainOptions(coder=coder, **SMALL)
        return
    check_train(labelled, "vib", method="online", coder=coder, coder_options=None,
                **{k: SMALL[k] for k in ("n_atoms", "patch_size", "stride", "sample_patches")})
    made = train.train_dictionary(ws, "vib", TrainOptions(coder=coder, **SMALL))
    attrs = ws.load_dictionary(made["dict_id"]).attrs
    assert attrs["coder"] == coder
    assert attrs["coder_options"] == dict(coding.METHODS[coder].defaults)
    assert attrs["params"]["coder_options"] == attrs["coder_options"]


def test_given_coder_options_are_kept_and_the_default_recipe_is_unchanged(labelled):
    ws = Workspace.open(labelled)
    default = train.train_dictionary(ws, "vib", TrainOptions(**SMALL))
    named = train.train_dictionary(ws, "vib", TrainOptions(coder_options={"n_nonzero": 5}, **SMALL))
    assert named["reused"] and named["dict_id"] == default["dict_id"]  # OMP: n_nonzero 5
    other = train.train_dictionary(ws, "vib", TrainOptions(coder_options={"n_nonzero": 2}, **SMALL))
    assert ws.load_dictionary(other["dict_id"]).attrs["coder_options"] == {"n_nonzero": 2}
