"""How good is the model: protocols (warm, cold), baselines, metrics and tuning.

Imports hybrid.estimator and below; never hybrid.planning.
"""
