"""hybrid: rating factors and attributes in one model, for catalogues with new items.

Examples
--------
>>> import hybrid
>>> hybrid.HybridFactorModel(rank=8).get_params()["rank"]
8
"""
from .errors import InputError
from .model import HybridFactorModel
from .planner import Plan, plan
from .store import load_model as load

__all__ = ["HybridFactorModel", "InputError", "Plan", "load", "plan"]
__version__ = "0.1.0"
