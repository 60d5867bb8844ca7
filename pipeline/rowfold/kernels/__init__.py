"""Pure per-block math on in-memory numpy arrays.

Nothing here sees Dask, a file or a path. Every function is module-level (so it pickles
to a worker), works on zero-row blocks, and works for real and complex dtypes.
"""

from rowfold.kernels.gram import block_gram, cholesky_upper, cross_product, solve_right_upper
from rowfold.kernels.householder import householder_q, householder_r, stacked_r
from rowfold.kernels.signs import positive_diagonal

__all__ = [
    "block_gram",
    "cholesky_upper",
    "cross_product",
    "householder_q",
    "householder_r",
    "positive_diagonal",
    "solve_right_upper",
    "stacked_r",
]
