"""atomline flows: Prefect flows over the stages, task runners, the CLI and the demo.

Example (runs with no Prefect server configured; Prefect starts a temporary one)::

    import numpy as np
    from atomline.flows import nightly_flow
    from atomline.flows.demo import vibration_records
    from atomline.stages.options import PoolOptions, TrainOptions
    from atomline.stages.workspace import Workspace

    X, y = vibration_records(2000, seed=0)
    ws = Workspace.open("demo.zarr", create=True)
    ws.add_records("vibration", X, chunk_rows=250)
    ws.add_labels("vibration", y)
    report = nightly_flow("demo.zarr", "vibration", train=TrainOptions(patch_size=64, stride=32),
                          pool=PoolOptions(regions=2))
    print(report["outcome"], report["candidate"]["features"], report["candidate"]["raw"])
"""

__all__ = ["train_flow", "encode_flow", "pool_flow", "evaluate_flow", "nightly_flow", "OUTCOMES",
           "STATE_NAMES"]


def __getattr__(name: str):
    # Imported lazily: the CLI lives in this package and must set Prefect's settings
    # (quiet logging, no telemetry) before Prefect is first imported.
    if name in __all__:
        from . import pipeline

        return getattr(pipeline, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
