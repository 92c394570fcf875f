"""Shared fixtures: a quiet, offline Prefect and small workspaces."""

from __future__ import annotations

import json
import logging
import os
import tempfile
import uuid

# Prefect reads these when first imported: keep it offline, quiet and out of ~/.prefect.
os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
os.environ.setdefault("PREFECT_HOME", tempfile.mkdtemp(prefix="atomline-prefect-"))
os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
# Flows run against the suite's own server (``prefect_harness``): never a developer's server,
# and never an ephemeral one Prefect would start by itself (which waits only a fixed time).
os.environ.pop("PREFECT_API_URL", None)
os.environ["PREFECT_SERVER_EPHEMERAL_ENABLED"] = "false"
# A loaded two-core machine can take minutes to start a server with a fresh database.
os.environ.setdefault("ATOMLINE_PREFECT_START_TIMEOUT", "900")

import numpy as np
import pytest
from atomline.stages.options import PoolOptions, TrainOptions


@pytest.fixture(scope="session")
def prefect_harness():
    """One real ``prefect server start`` on a free loopback port for the whole session.

    Started the way the CLI starts its temporary server (``flows/_server.py``), on the
    session's fresh ``PREFECT_HOME``, and exported as ``PREFECT_API_URL`` to this process
    and every subprocess a test starts; stopped with everything it started at the end.
    """
    from atomline.flows._server import temporary_server

    with temporary_server() as url:
        yield url


@pytest.fixture
def memory_url() -> str:
    """A fresh in-memory workspace URL."""
    return f"memory://atomline-test-{uuid.uuid4().hex}"


@pytest.fixture(scope="session")
def demo_small():
    """A small labelled demo archive (synthetic vibration records)."""
    from atomline.flows.demo import vibration_records

    return vibration_records(600, seed=3)


@pytest.fixture
def labelled(tmp_path, demo_small):
    """A local workspace with 120 labelled records of 2048 samples."""
    X, y = demo_small
    url = str(tmp_path / "ws.zarr")
    from atomline.stages.workspace import Workspace

    ws = Workspace.open(url, create=True)
    ws.add_records("vib", X[:120], chunk_rows=40)
    ws.add_labels("vib", y[:120])
    return url


def store_snapshot(ws) -> dict[str, bytes]:
    """Every key and its bytes in a workspace's store, to prove nothing changed."""
    import asyncio

    store = ws.root.store

    async def collect():
        out = {}
        async for key in store.list():
            buf = await store.get(key, prototype=_proto())
            out[key] = None if buf is None else buf.to_bytes()
        return out

    return asyncio.run(collect())


def _proto():
    from zarr.core.buffer import default_buffer_prototype

    return default_buffer_prototype()


def unit_atoms(k: int, d: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    W = rng.standard_normal((k, d))
    return W / np.linalg.norm(W, axis=1, keepdims=True)


DIGITS_TRAIN = dict(n_atoms=64, patch_size=4, stride=1, sample_patches=10_000, seed=0,
                    coder_options={"n_nonzero": 3})


@pytest.fixture(scope="session")
def digits_workspace():
    """scikit-learn's bundled handwritten digits (1797 images of 8×8, an open data set) in a
    workspace, with a dictionary trained, encoded and pooled by the stages (no Prefect)."""
    from sklearn.datasets import load_digits

    from atomline.stages import encode, pool, train
    from atomline.stages.workspace import Workspace

    digits = load_digits()
    ws = Workspace.open(f"memory://digits-{uuid.uuid4().hex}", create=True)
    ws.add_records("digits", digits.images.astype(np.float32), chunk_rows=300)
    ws.add_labels("digits", digits.target)
    dict_id = train.train_dictionary(ws, "digits", TrainOptions(**DIGITS_TRAIN))["dict_id"]
    encode.encode_chunks(ws, "digits", dict_id, encode.prepare_encode(ws, "digits", dict_id)["pending"])
    pool.pool_chunks(ws, "digits", dict_id, pool.prepare_pool(ws, "digits", dict_id, options=PoolOptions(regions=2))["pending"])
    return ws, dict_id


@pytest.fixture
def s3_endpoint(monkeypatch):
    """A local S3-compatible endpoint (moto) on 127.0.0.1 with one bucket."""
    pytest.importorskip("s3fs")
    from moto.server import ThreadedMotoServer

    from atomline.stages.workspace import STORAGE_OPTIONS_ENV

    logging.getLogger("werkzeug").setLevel(logging.ERROR)  # one line per request otherwise
    server = ThreadedMotoServer(ip_address="127.0.0.1", port=0, verbose=False)
    server.start()
    host, port = server.get_host_and_port()
    options = {"key": "AKIDATOMLINETEST", "secret": "atomline-s3-secret-5f2c",
               "client_kwargs": {"endpoint_url": f"http://{host}:{port}", "region_name": "eu-west-1"}}
    import s3fs

    s3fs.S3FileSystem(**options, skip_instance_cache=True).mkdir("archive", region_name="eu-west-1")
    monkeypatch.setenv(STORAGE_OPTIONS_ENV, json.dumps(options))
    yield options
    # moto keeps its buckets in this process across servers: start the next test empty.
    import requests

    requests.post(f"http://{host}:{port}/moto-api/reset", timeout=10)
    server.stop()
