"""Shared fixtures: a quiet, offline Prefect and small workspaces."""

from __future__ import annotations

import os
import tempfile
import uuid

# Prefect reads these when first imported: keep it offline, quiet and out of ~/.prefect.
os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
os.environ.setdefault("PREFECT_HOME", tempfile.mkdtemp(prefix="atomline-prefect-"))
os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")

import numpy as np
import pytest


@pytest.fixture(scope="session")
def prefect_harness():
    """One temporary Prefect API for the whole session (entering it takes ~13 s)."""
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness():
        yield


@pytest.fixture
def memory_url() -> str:
    """A fresh in-memory workspace URL."""
    return f"memory://atomline-test-{uuid.uuid4().hex}"


@pytest.fixture(scope="session")
def demo_small():
    """A small labelled demo archive (synthetic vibration records)."""
    from atomline.flows.demo import vibration_records

    return vibration_records(600, seed=3)


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
