"""The coder and learner records: option lists from the signatures, defaults that run."""

from __future__ import annotations

import inspect

import numpy as np
import pytest
from conftest import unit_atoms

from atomline.stages.errors import InputError
from atomline.stages.kernels import coding, learning
from atomline.stages.kernels._records import REQUIRED
from atomline.stages.kernels.coding import Coder, code, code_width, default_options
from atomline.stages.kernels.coding.omp import omp, omp_width
from atomline.stages.kernels.learning import Method, learn
from atomline.stages.kernels.learning.kmeans import kmeans

IN_LEARNER = sorted(n for n, c in coding.METHODS.items() if c.in_learner)


def _rows(n=600, d=16, seed=0):
    return np.random.default_rng(seed).standard_normal((n, d))


def test_a_record_out_of_step_with_its_function_is_refused():
    with pytest.raises(ValueError, match="tol"):  # omp also takes tol and gram
        Coder("omp-again", omp, omp_width, "OMP.", {"n_nonzero": "Sparsity."})
    with pytest.raises(ValueError, match="no_such"):
        Coder("omp-again", omp, omp_width, "OMP.",
              {"n_nonzero": "-", "tol": "-", "gram": "-"}, {"no_such": 1})
    with pytest.raises(ValueError, match="colour"):  # help for an option kmeans lacks
        Method("kmeans-again", kmeans, "k-means.", {"colour": "?"})


def _keyword_only(fn, leave_out=()):
    params = inspect.signature(fn).parameters
    return sorted(n for n, p in params.items() if p.kind is p.KEYWORD_ONLY and n not in leave_out)


def test_option_tables_list_every_option_with_help_type_and_default():
    for name, options in coding.option_table().items():
        assert [o.name for o in options] == _keyword_only(coding.METHODS[name].run), name
        assert all(o.help.strip() for o in options), name
    for name, options in learning.option_table().items():
        assert [o.name for o in options] == _keyword_only(learning.METHODS[name].run,
                                                          ("checkpoint", "resume")), name
        assert all(o.help.strip() for o in options), name
    omp_table = {o.name: o for o in coding.option_table()["omp"]}
    assert omp_table["n_nonzero"].default == 5 and omp_table["n_nonzero"].type is int
    assert omp_table["tol"].default is None
    assert {o.name: o.default for o in coding.option_table()["learned"]}["encoder"] is REQUIRED
    online = {o.name: o for o in learning.option_table()["online"]}
    assert online["batch_size"].default == 256 and online["batch_size"].type is int
    assert {o.name: o.default for o in learning.option_table()["kmeans"]}["batch_size"] == 1024


@pytest.mark.parametrize("method", sorted(learning.METHODS))
def test_learner_table_defaults_are_what_the_learner_runs_with(method):
    n_atoms = 4 if method == "pca" else 8
    result = learn(_rows(), n_atoms, method)
    table = {o.name: o.default for o in learning.option_table()[method]}
    recorded = {k: v for k, v in result.params.items() if k in table and table[k] is not None}
    assert recorded, method  # every learner records some of its options
    assert recorded == {k: table[k] for k in recorded}
    assert learning.METHODS[method].takes_coder == ("coder" in table)


@pytest.mark.parametrize("coder", sorted(coding.METHODS))
def test_each_coders_defaults_code_rows(coder):
    W, X = unit_atoms(12, 16), _rows(50)
    options = default_options(coder)
    if coder == "learned":
        assert options == {}  # its encoder is trained for given atoms: no default exists
        return
    codes = code(X, W, coder, **options)
    assert codes.width == code_width(coder, 12, **options)
    assert (codes.count > 0).mean() > 0.5  # most rows use an atom
    if "n_nonzero" in options:
        assert codes.count.max() <= options["n_nonzero"] == 5


@pytest.mark.parametrize("coder", IN_LEARNER)
def test_online_learns_with_any_coder_given_no_options(coder):
    # Failed before for every coder but omp: no options meant {} for them.
    result = learn(_rows(), 8, "online", coder=coder, batch_size=200)
    assert result.params["coder_options"] == coding.METHODS[coder].defaults
    assert np.allclose(np.linalg.norm(result.atoms, axis=1), 1)


def test_given_coder_options_keep_their_values_and_gain_only_required_ones():
    from atomline.stages.kernels.learning import default_coder_options

    assert default_coder_options("omp", {"tol": 0.1}) == {"n_nonzero": 5, "tol": 0.1}
    assert default_coder_options("lars", {"lam": 0.5}) == {"lam": 0.5}
    assert default_coder_options("threshold", None) == {}
    with pytest.raises(InputError, match="train_encoder"):
        default_coder_options("learned", None)
    with pytest.raises(InputError, match="coding method: expected one of"):
        default_coder_options("nope", None)
