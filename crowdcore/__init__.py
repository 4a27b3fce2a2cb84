"""crowdcore: a data-driven crowd runtime.

Public surface: World, Params, Scene, RecordSet, load_scenario, and the error classes.
Submodules load on first use, so `import crowdcore` stays cheap for hosts.
"""
from . import _jit  # noqa: F401  (sets the threading layer before numba starts threads)
from .errors import CrowdError, ScenarioError, TrajectoryError, RecordSetError, SnapshotError, StepError

__version__ = "0.1.0"

_LAZY = {
    "World": "world", "Params": "params", "Scene": "scene", "RecordSet": "records",
    "default_record_set": "records", "records_from_trajectories": "records", "load_scenario": "scenario",
}
__all__ = sorted(_LAZY) + ["CrowdError", "ScenarioError", "TrajectoryError", "RecordSetError", "SnapshotError",
                           "StepError", "__version__"]


def __getattr__(name):
    if name in _LAZY:
        import importlib
        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'crowdcore' has no attribute {name!r}")
