"""The kernels: sparse coders, dictionary learners, patches and normalisation, scores.

Pure functions and small classes over in-memory arrays (numpy, scipy, scikit-learn, numba).
Nothing here imports Prefect or Zarr, reads a store or logs; a test
(``tests/test_imports.py``) keeps it so.
"""
