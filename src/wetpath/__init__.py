"""wetpath: effective wettability along the saturation path from time-resolved 3D images.

Axis order is (z, y, x) = (plane, row, column) everywhere. Lengths are in the unit of ``voxel_size``
(micrometres in the workflow). Label volumes use the canonical phase codes of :class:`PhaseCodes`
(0 excluded, 1 solid, 2 wetting, 3 non-wetting) unless ``codes`` says otherwise.

The public API is listed once, here; implementations live in private modules and are imported on
first use so that ``import wetpath`` stays cheap.
"""

from __future__ import annotations

import importlib

from ._codes import PhaseCodes
from ._errors import WetpathError

__version__ = "0.1.0"

# public name -> private module that defines it
_LAZY = {
    # reading and storing volumes
    "read_volume": "._readers",
    "ingest_volume": "._ingest",
    "open_step": "._store",
    "segment_grayscale": "._segment",
    # per-state geometry
    "measure_state": "._measure",
    "measure_clusters": "._measure",
    # fluid clusters
    "label_clusters": "._clusters",
    "track_clusters": "._tracking",
    # wettability estimators
    "topological_angle": "._topological",
    "energy_balance_angle": "._energy",
    "geometric_angles": "._geometric",
    # saturation-path history
    "assign_branches": "._history",
    "branch_summary": "._history",
    # demo series
    "write_demo_series": "._demo",
}

__all__ = ["PhaseCodes", "WetpathError", "__version__", *_LAZY]


def __getattr__(name: str):
    if name in _LAZY:
        value = getattr(importlib.import_module(_LAZY[name], __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'wetpath' has no attribute {name!r}")


def __dir__():
    return sorted(__all__)
