"""The numerical core: block solves, the alternating trainer, the learned prior, the launch offset,
Gaussian posteriors and neighbour kernels, on arrays and sparse matrices only.

Imports only hybrid.common.
"""
