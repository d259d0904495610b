"""The sampling planner: item posteriors assessed, the budget split, whom to ask, and the
calibration check of its numbers.

Imports hybrid.estimator and below; never hybrid.evaluation.
"""
