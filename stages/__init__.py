"""atomline stages: kernels, the Zarr workspace, and the four pipeline stages.

Layers (see DEVELOPERS.md): ``coding``, ``learning`` and ``prep`` are pure numpy/scipy
kernels; ``workspace`` is the only module that knows the Zarr layout; ``train``,
``encode``, ``pool`` and ``evaluate`` are the stages, each a plain function with a
Prefect task made from it.
"""

from .errors import AtomlineError

__all__ = ["AtomlineError"]
