"""Cross-validation folds: stratified, grouped by sample, checked before use."""

from __future__ import annotations

import numpy as np
from sklearn.model_selection import StratifiedGroupKFold, StratifiedKFold

from topoclass.errors import TopoclassError


def fold_splits(y, groups, cv, seed) -> list[tuple[np.ndarray, np.ndarray]]:
    """Stratified (group) folds, after checking that every class can fill every fold."""
    if int(cv) != cv or cv < 2:
        raise TopoclassError(f"cv must be an integer of at least 2, not {cv!r}")
    cv = int(cv)
    classes = np.unique(y)
    if classes.shape[0] < 2:
        raise TopoclassError(f"training needs at least two classes; the labels hold only "
                             f"{[plain_value(c) for c in classes]}")
    unit = "images" if groups is None else "sample groups"
    for c in classes:
        members = y == c
        n = int(members.sum()) if groups is None else np.unique(groups[members]).shape[0]
        if n < cv:
            raise TopoclassError(
                f"class {plain_value(c)!r} has only {n} {unit}, fewer than the {cv} "
                f"cross-validation folds; label more {unit} of this class or use fewer "
                f"folds (cv={max(n, 2)})"
            )
    if groups is None:
        splitter = StratifiedKFold(n_splits=cv, shuffle=True, random_state=seed)
        return list(splitter.split(np.zeros(y.shape[0]), y))
    splitter = StratifiedGroupKFold(n_splits=cv, shuffle=True, random_state=seed)
    return list(splitter.split(np.zeros(y.shape[0]), y, groups))


def check_lengths(X, y, groups) -> None:
    n = X.shape[0] if hasattr(X, "shape") else len(X)
    if n != y.shape[0] or (groups is not None and groups.shape[0] != n):
        raise TopoclassError(f"{n} inputs but {y.shape[0]} labels"
                             + ("" if groups is None else f" and {groups.shape[0]} groups")
                             + "; give one label (and group) per image")


def plain_value(value):
    return value.item() if isinstance(value, np.generic) else value
