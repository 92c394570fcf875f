"""How long the default search takes against one nightly run of the same data.

Data: scikit-learn's ``load_digits`` (1,797 8×8 images shipped with scikit-learn), all
rows, in one local workspace. Measured in this run, side by side:

* one ``nightly_flow`` with the records' shape defaults (patch 4 × 4, stride 1, 3 × 3
  regions, 32 atoms, 4 nonzeros: ``default_settings((8, 8), n)``), from an empty workspace;
* one ``search_flow`` with the default :class:`SearchOptions`.

Prints both wall times and their ratio (goal: the search within ~10× the nightly run), and
the search's ranked table. Run as a script (pytest does not collect ``bench_*.py``)::

    python tests/benchmarks/bench_search.py
"""

from __future__ import annotations

import tempfile
import time

import numpy as np
from sklearn.datasets import load_digits

from atomline.flows import nightly_flow
from atomline.flows.search import search_flow
from atomline.stages.kernels.shape_rules import default_settings
from atomline.stages.options import PoolOptions, SearchOptions, TrainOptions
from atomline.stages.search import table_text
from atomline.stages.workspace import Workspace


def workspace(X: np.ndarray, y: np.ndarray) -> str:
    url = tempfile.mkdtemp(prefix="bench-search-") + "/ws"
    ws = Workspace.open(url, create=True)
    ws.add_records("digits", X.reshape(-1, 8, 8).astype(np.float32), chunk_rows=256)
    ws.add_labels("digits", y)
    return url


def main() -> None:
    X, y = load_digits(return_X_y=True)
    s = default_settings((8, 8), X.shape[0])
    t0 = time.perf_counter()
    # The nightly defaults resolve to these values on digits; given explicitly so the
    # measured run is the shape-default configuration whatever else the workspace holds.
    nightly_flow(workspace(X, y), "digits",
                 train=TrainOptions(n_atoms=s.n_atoms, patch_size=s.patch_size, stride=s.stride,
                                    coder_options={"n_nonzero": s.n_nonzero},
                                    sample_patches=s.sample_patches),
                 pool=PoolOptions(regions=s.regions))
    nightly = time.perf_counter() - t0
    t0 = time.perf_counter()
    result = search_flow(workspace(X, y), "digits", search=SearchOptions())
    search = time.perf_counter() - t0
    print(table_text(result["ranked"]))
    print(f"nightly {nightly:.1f} s, search {search:.1f} s "
          f"({len(result['trials'])} trials), ratio {search / nightly:.1f}")


if __name__ == "__main__":
    from atomline.flows._server import temporary_server

    with temporary_server():  # started before either timing, so neither pays for it
        main()
