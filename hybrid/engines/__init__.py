"""Where the trainer runs: the Dask engine, offering the same rating-data methods as the local one.

Imports hybrid.core and hybrid.common.
"""
