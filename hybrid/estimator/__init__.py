"""The estimator users fit: HybridFactorModel, its attribute encoder, updates, predictions,
related items and batch scoring.

Imports the layers below it (engines, datasets, core, io, common).
"""
