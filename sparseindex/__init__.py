"""sparseindex: a content-addressable store for sparse binary codes.

Store millions of wide, sparse binary codes; recall the stored codes that a
noisy or partial query overlaps; and size the store from a false-hit target
with the hypergeometric model.

Examples
--------
>>> import sparseindex
>>> store = sparseindex.Store(bits=256, threshold=3, seed=0)
>>> ids = store.add([[1, 5, 9, 13], [2, 6, 10]])
>>> store.query([1, 5, 9, 200]).ids.tolist()
[0]
"""

from . import model
from .codes import Codes
from .near_duplicates.labelling import NearDuplicateSummary, label_near_duplicates
from .errors import SaturationWarning, FormatVersionWarning, ReadOnlyStoreError, StoreFormatError
from .health import FalseHitMeasurement, Health
from .model import PlanError
from .model.planner import Plan, plan
from .store import BatchHits, Hits, Store
from .version import __version__


__all__ = ["Codes", "Store", "Hits", "BatchHits", "plan", "Plan", "PlanError", "model",
    "StoreFormatError", "ReadOnlyStoreError", "FormatVersionWarning", "SaturationWarning",
    "Health", "FalseHitMeasurement", "label_near_duplicates", "NearDuplicateSummary", "__version__"]
