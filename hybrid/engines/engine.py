"""Where a fit runs: an execution context, not a modelling setting.

The fitted model is the same on every engine, so the engine is not among the estimator's
settings (``get_params``, ``clone``): it is given to ``fit`` and recorded in the model's
metrics as provenance only; loading a model never depends on it.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

from hybrid.common.errors import InputError
from hybrid.common.limits import SETTINGS


@dataclass(frozen=True)
class Engine:
    """Where the training's half-steps run.

    Parameters
    ----------
    kind : {'local', 'dask'}
        This process, or a Dask cluster (:mod:`hybrid.engines.cluster`; needs the ``dask`` extra).
    address : str, optional
        With ``'dask'``: the scheduler (``tcp://host:8786``); ``None`` starts a local cluster of
        two worker processes for the fit.
    partitions : int
        With ``'dask'``: blocks per side of the rating matrix.
    shared_dir : str, optional
        With ``'dask'``: a folder every worker can read, where the partitioned ratings are
        written for the fit (and removed after); ``None`` is the temporary folder, which suits
        a cluster on this machine only.

    Examples
    --------
    >>> Engine().kind, Engine("dask", partitions=4).provenance()["partitions"]
    ('local', 4)
    >>> Engine("spark")
    Traceback (most recent call last):
    ...
    hybrid.common.errors.InputError: engine must be one of 'local', 'dask', found 'spark'
    """

    kind: str = "local"
    address: str | None = None
    partitions: int = 8
    shared_dir: str | None = None

    def __post_init__(self):
        rules = SETTINGS["engine"]
        for name, value in (("engine", self.kind), ("partitions", self.partitions)):
            rule = rules["kind" if name == "engine" else name]
            if not rule.ok(value):
                raise InputError(f"{name} must be {rule.allowed}, found {value!r}")

    @classmethod
    def from_settings(cls, engine: dict, address: str | None = None) -> "Engine":
        """The ``[engine]`` section of the settings (``address`` overrides, a started cluster's)."""
        return cls(engine["kind"], address or engine["address"] or None, engine["partitions"],
                   engine["shared_dir"] or None)

    def provenance(self) -> dict:
        """What the model file records of where it was fitted."""
        return asdict(self)


LOCAL = Engine()
