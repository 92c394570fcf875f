"""Options chosen from the records' shape (stages/settings.py) in the train and pool stages."""

from __future__ import annotations

import uuid

import numpy as np
import pytest

from atomline.stages import encode, pool, train
from atomline.stages.errors import InputError
from atomline.stages.kernels.prep import PatchGeometry
from atomline.stages.options import PoolOptions, TrainOptions
from atomline.stages.settings import pool_regions, resolve
from atomline.stages.workspace import Workspace


def _ws(shape, n=30, kind=None, seed=0):
    ws = Workspace.open(f"memory://settings-{uuid.uuid4().hex}", create=True)
    X = np.random.default_rng(seed).normal(size=(n, *shape)).astype(np.float32)
    ws.add_records("r", X, kind=kind)
    return ws


def _features(ws, options=PoolOptions()):
    dict_id = train.train_dictionary(ws, "r")["dict_id"]
    prepared = encode.prepare_encode(ws, "r", dict_id)
    encode.encode_chunks(ws, "r", dict_id, prepared["pending"])
    pooled = pool.prepare_pool(ws, "r", dict_id, options)
    pool.pool_chunks(ws, "r", dict_id, pooled["pending"])
    return dict_id, pooled, ws.output(pool.features_path(dict_id, "r")).group["values"][:]


def test_forty_sample_records_train_encode_and_pool_with_no_option():
    # The old defaults (the whole record as one patch, then 4 regions on a 1-position grid)
    # refused these records at pooling.
    ws = _ws((40,))
    dict_id, pooled, feats = _features(ws)
    geometry = PatchGeometry.from_attrs(ws.load_dictionary(dict_id).attrs["geometry"])
    # 40 / 8 = 5 samples, raised to the 8-sample floor of shape_rules; dense stride.
    assert geometry.size == (8,) and geometry.stride == (1,) and geometry.grid == (33,)
    assert pooled["regions"] == [4]
    n_atoms = ws.load_dictionary(dict_id).attrs["n_atoms"]
    assert feats.shape == (30, 2 * 4 * n_atoms) and np.isfinite(feats).all() and (feats != 0).any()


def test_small_images_pool_within_their_grid():
    ws = _ws((8, 8))
    dict_id, pooled, feats = _features(ws)
    attrs = ws.load_dictionary(dict_id).attrs
    assert attrs["geometry"]["size"] == [4, 4] and attrs["settings"]["kind"] == "images"
    assert pooled["regions"] == [3, 3] and feats.shape == (30, 2 * 9 * attrs["n_atoms"])


def test_chosen_values_and_reasons_reach_the_manifest_and_the_dictionary():
    ws = _ws((150,))
    manifest = train.train_dictionary(ws, "r")
    settings = manifest["settings"]
    # 150 / 8 ≈ 19 samples: the rule of thumb in shape_rules (a patch spans ~1/8 of a signal).
    assert manifest["geometry"]["size"] == [19] and manifest["geometry"]["stride"] == [1]
    assert settings["reasons"]["patch_size"].startswith("Patches of 19 samples: about 1/8 of the length 150")
    assert manifest["n_atoms"] == 38 and "38 atoms" in settings["reasons"]["n_atoms"]
    assert ws.load_dictionary(manifest["dict_id"]).attrs["settings"] == settings
    assert ws.load_dictionary(manifest["dict_id"]).attrs["coder_options"]["n_nonzero"] == 4


def test_explicit_values_win_and_say_so():
    ws = _ws((150,))
    given = TrainOptions(n_atoms=7, patch_size=30, coder_options={"n_nonzero": 2},
                         preprocessing={"contrast": False}, sample_patches=500)
    options, chosen = resolve(ws, "r", given)
    assert (options.n_atoms, options.patch_size, options.stride) == (7, (30,), (30,))
    assert options.coder_options == {"n_nonzero": 2} and options.sample_patches == 500
    assert options.preprocessing == {"contrast": False}
    assert chosen["reasons"]["n_atoms"] == "n_atoms = 7 was given."
    assert "patches lie side by side" in chosen["reasons"]["stride"]
    # Regions default within the given geometry's grid of 5 positions: 4 still fit.
    assert chosen["regions"] == [4]
    one_patch, chosen = resolve(ws, "r", TrainOptions(patch_size=150))
    assert chosen["regions"] == [1] and "within the 1 patch positions" in chosen["reasons"]["regions"]


def test_a_configuration_that_cannot_work_is_refused_naming_the_value():
    ws = _ws((40,))
    with pytest.raises(InputError, match=r"n_atoms: .*at most the 30 patches.*Use n_atoms ≤ 30"):
        train.train_dictionary(ws, "r", TrainOptions(patch_size=40, n_atoms=64, sample_patches=64))
    assert list(ws.root["dictionaries"].group_keys()) == []  # refused before anything was made
    with pytest.raises(InputError, match=r"patch_size: expected 1..40"):
        resolve(ws, "r", TrainOptions(patch_size=41))


def test_vectors_are_one_patch_when_the_records_say_so():
    ws = _ws((20,), kind="vectors")
    assert ws.describe_records("r")["kind"] == "vectors"
    options, chosen = resolve(ws, "r", TrainOptions())
    assert options.patch_size is None and chosen["kind"] == "vectors" and chosen["regions"] == [1]
    # Feature columns need not share a unit: whitened column-wise, no per-patch normalisation.
    assert options.preprocessing == {"remove_mean": False, "contrast": False, "whiten": True}
    with pytest.raises(InputError, match="patch_size: expected none for vectors"):
        resolve(ws, "r", TrainOptions(patch_size=5))
    # The same values as signals are cut into patches.
    signals = _ws((20,))
    assert signals.records_kind("r") == "signals"
    assert resolve(signals, "r", TrainOptions())[0].patch_size == (8,)


def test_vectors_need_rank_one_records():
    ws = Workspace.open(f"memory://settings-{uuid.uuid4().hex}", create=True)
    with pytest.raises(InputError, match="kind 'vectors'.*records of shape \\(4, 4\\)"):
        ws.add_records("r", np.zeros((5, 4, 4), np.float32), kind="vectors")
    with pytest.raises(InputError, match="kind: expected one of"):
        ws.add_records("r", np.zeros((5, 4), np.float32), kind="table")


def test_pool_regions_of_a_dictionary_without_chosen_settings_stay_within_the_grid():
    assert pool_regions({}, (1,))[0] == (1,)
    assert pool_regions({}, (10,))[0] == (4,)
    assert pool_regions({"settings": {"regions": [3, 3]}}, (2, 5))[0] == (2, 3)


def test_given_regions_beyond_the_grid_are_still_refused():
    ws = _ws((40,))
    dict_id = train.train_dictionary(ws, "r", TrainOptions(patch_size=40))["dict_id"]
    prepared = encode.prepare_encode(ws, "r", dict_id)
    encode.encode_chunks(ws, "r", dict_id, prepared["pending"])
    assert pool.prepare_pool(ws, "r", dict_id)["regions"] == [1]
    with pytest.raises(InputError, match="regions"):
        pool.prepare_pool(ws, "r", dict_id, PoolOptions(regions=4), overwrite=True)
