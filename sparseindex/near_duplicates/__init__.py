"""Near-duplicate labelling of a batch: exact index or banded min-hash candidates, union-find groups."""

from .labelling import (EXACT_BUDGET_SECONDS, NearDuplicateSummary, TqdmProgress, label_near_duplicates,
                        planted_duplicates)

__all__ = ["label_near_duplicates", "NearDuplicateSummary", "TqdmProgress", "planted_duplicates",
           "EXACT_BUDGET_SECONDS"]
