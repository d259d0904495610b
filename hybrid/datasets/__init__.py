"""Data to try the program on: the invented tasting club and MovieLens from the package registry.

Imports hybrid.io and hybrid.common.
"""
