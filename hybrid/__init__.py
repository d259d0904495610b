"""hybrid: rating factors and attributes in one model, for catalogues with new items.

The public names load on first use, so that importing one layer (``hybrid.core``, say) does
not import the others.

Examples
--------
>>> import hybrid
>>> hybrid.HybridFactorModel(rank=8).get_params()["rank"]
8
"""
__all__ = ["HybridFactorModel", "InputError", "Plan", "expected_kept", "load", "plan"]
__version__ = "0.1.0"

_PUBLIC = {
    "HybridFactorModel": ("hybrid.estimator.model", "HybridFactorModel"),
    "InputError": ("hybrid.common.errors", "InputError"),
    "Plan": ("hybrid.planning.planner", "Plan"),
    "plan": ("hybrid.planning.planner", "plan"),
    "expected_kept": ("hybrid.planning.kept", "expected_kept"),
    "load": ("hybrid.estimator.model", "HybridFactorModel.load"),
}


def __getattr__(name):
    if name not in _PUBLIC:
        raise AttributeError(f"module 'hybrid' has no attribute {name!r}")
    import importlib

    module, path = _PUBLIC[name]
    value = importlib.import_module(module)
    for attr in path.split("."):
        value = getattr(value, attr)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))
