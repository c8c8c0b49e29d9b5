"""Labelling: a label book written at every label, which images to label next, a local page.

==============  ==================================================================
``sheet``       :class:`LabelBook`, a label sheet being filled in (atomic, locked)
``ranking``     which images to label next (margin uncertainty × k-centre diversity)
``server``      the local labelling page (Starlette on 127.0.0.1, token in the URL)
==============  ==================================================================
"""

from topoclass.labeling.ranking import (
    MIN_PER_CLASS,
    PoolFeatures,
    Suggestion,
    diverse_order,
    estimate_from_rows,
    estimate_macro_f1,
    margin_uncertainty,
    rank_records,
    rank_rows,
    suggest_from_sheet,
)
from topoclass.labeling.sheet import LabelBook

__all__ = [
    "MIN_PER_CLASS", "LabelBook", "PoolFeatures", "Suggestion", "diverse_order",
    "estimate_from_rows", "estimate_macro_f1", "margin_uncertainty", "rank_records",
    "rank_rows", "suggest_from_sheet",
]
