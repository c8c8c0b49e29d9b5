"""Nearest labelled images: the training images whose H1 diagrams lie closest to a new one.

A score is easier to trust (or doubt) beside the labelled images it resembles. The distance is
the sliced Wasserstein distance between persistence diagrams (Carrière, Cuturi & Oudot, ICML
2017): every diagram, completed by the diagonal projections of the other's points, is projected
onto directions of the half circle, and the 1-D optimal transport cost of the sorted
projections is averaged over the directions. It is cheap (a sort per direction) where the
exact Wasserstein matching is cubic in the number of bars, and it is equivalent to the
1-Wasserstein distance ``W1`` up to constants (the paper's Theorem 3.3, from memory)::

    W1(A, B) / (2 M) <= SW(A, B) <= 2 sqrt(2) W1(A, B),   M = 1 + 2 N (2 N - 1),

where ``N`` bounds the number of points of the two diagrams. So when one training diagram is
closer to the query than another by more than the factor ``4 sqrt(2) M`` in ``W1``, the sliced
distance ranks them the same way; closer calls may swap, which is acceptable for a visual aid.

The directions are those of :func:`persim.sliced_wasserstein` (``M`` equal steps from pi/2), so
the two agree to float rounding (``tests/test_neighbours.py``); this vectorised version is used
because persim loops over the points in Python (timed against it in
``benchmarks/bench_neighbours.py``).
"""

from __future__ import annotations

from contextlib import nullcontext
from dataclasses import dataclass

import numpy as np

from topoclass.records import PatternRecord, bars_of

#: Directions of the half circle the diagrams are projected on (persim's default).
DEFAULT_DIRECTIONS = 50
#: Side, in pixels, of the square thumbnail kept for each training image.
THUMBNAIL_PX = 64


def sliced_distance(a: np.ndarray, b: np.ndarray, *, n_directions: int = DEFAULT_DIRECTIONS
                    ) -> float:
    """Sliced Wasserstein distance between two persistence diagrams ``(n, 2)`` of (birth, death).

    Parameters
    ----------
    a, b : array-like of shape (n, 2)
        Finite diagrams; either may be empty.
    n_directions : int
        Number of projection directions.

    Returns
    -------
    float
    """
    dirs = _directions(n_directions)
    return float(_sliced(_as_bars(a), _as_bars(b), dirs))


@dataclass
class LabelledDiagrams:
    """The H1 diagrams, labels and thumbnails of a model's training images.

    Attributes
    ----------
    bars : ndarray of shape (total, 2)
        All H1 bars (spacing units), image after image.
    offsets : ndarray of int, shape (n_images + 1,)
        Image ``i`` owns ``bars[offsets[i]:offsets[i + 1]]``.
    labels, images : ndarray of str, shape (n_images,)
        Class label and file name of each training image.
    thumbnails : ndarray of uint8, shape (n_images, THUMBNAIL_PX, THUMBNAIL_PX)
        Grey centre-square thumbnails (all zero when none were made).
    n_directions : int
        Projection directions of the distance.
    """

    bars: np.ndarray
    offsets: np.ndarray
    labels: np.ndarray
    images: np.ndarray
    thumbnails: np.ndarray
    n_directions: int = DEFAULT_DIRECTIONS

    def __len__(self) -> int:
        return int(self.offsets.shape[0] - 1)

    def diagram(self, i: int) -> np.ndarray:
        """H1 bars of training image ``i``."""
        return self.bars[self.offsets[i]:self.offsets[i + 1]]

    def distances(self, h1: np.ndarray) -> np.ndarray:
        """Sliced Wasserstein distance from ``h1`` to every training diagram."""
        dirs = _directions(self.n_directions)
        query = _projections(_as_bars(h1), dirs)
        # The training diagrams' sorted projections are made once per model in this process
        # (a report asks for every scored image), not once per pair.
        key = (id(self.bars), self.bars.shape, self.n_directions)
        if getattr(self, "_projected_key", None) != key:
            self._projected = [_projections(self.diagram(i), dirs) for i in range(len(self))]
            self._projected_key = key
        return np.array([_sliced_sorted(*query, *other) for other in self._projected])

    def nearest(self, h1: np.ndarray, k: int = 3) -> list[dict]:
        """The ``k`` training images closest to ``h1``, closest first.

        Returns
        -------
        list of dict
            ``index``, ``label``, ``image`` (file name) and ``distance`` (spacing units).
        """
        if k < 1:
            raise ValueError(f"k must be at least 1, not {k!r}")
        dist = self.distances(h1)
        order = np.argsort(dist, kind="stable")[:k]
        return [{"index": int(i), "label": str(self.labels[i]), "image": str(self.images[i]),
                 "distance": float(dist[i])} for i in order]


def nearest_labelled(model, h1, k: int = 3) -> list[dict] | None:
    """The ``k`` training images of a trained ``model`` nearest to the H1 diagram ``h1``.

    None when there is no model or it was trained before models kept their training diagrams.
    """
    neighbours = getattr(model, "neighbours", None)
    if neighbours is None or len(neighbours) == 0:
        return None
    return neighbours.nearest(h1, k=k)


def labelled_diagrams(records: list[PatternRecord], labels, *, thumbnails: bool = True,
                      progress: bool = False) -> LabelledDiagrams:
    """Collect what :meth:`LabelledDiagrams.nearest` needs from a training set.

    Parameters
    ----------
    records : list of PatternRecord
        The training records; ``record.source`` names the image file.
    labels : array-like of shape (n,)
        Their class labels.
    thumbnails : bool
        Read each image again for a small thumbnail (centre square).
    progress : bool
        Show a progress bar while the thumbnails are made.
    """
    labels = np.asarray(labels).astype(str)
    if len(records) != labels.shape[0]:
        raise ValueError(f"{len(records)} records but {labels.shape[0]} labels")
    parts = [bars_of(r.diagrams, 1) for r in records]
    offsets = np.concatenate([[0], np.cumsum([p.shape[0] for p in parts])]).astype(np.int64)
    bars = np.vstack(parts) if parts else np.zeros((0, 2))
    names = np.array([str(r.source or "") for r in records], dtype=str)
    thumbs = np.zeros((len(records), THUMBNAIL_PX, THUMBNAIL_PX), dtype=np.uint8)
    if thumbnails:
        from topoclass._progress import progress_bar
        from topoclass.errors import TopoclassError
        from topoclass.images import read_micrograph

        bar = progress_bar(len(records), "thumbnails") if progress else nullcontext(_no_op)
        with bar as advance:
            for i, name in enumerate(names):
                try:
                    thumbs[i] = square_thumbnail(read_micrograph(name).image)
                except (TopoclassError, OSError):
                    pass  # measured a moment ago; if it is gone now, the thumbnail stays blank
                advance()
    return LabelledDiagrams(bars=bars, offsets=offsets, labels=labels, images=names,
                            thumbnails=thumbs)


def square_thumbnail(image: np.ndarray, size: int = THUMBNAIL_PX) -> np.ndarray:
    """The centre square of a [0, 1] grey image, resized to ``size`` x ``size`` uint8."""
    from PIL import Image

    rows, cols = image.shape
    side = min(rows, cols)
    r0, c0 = (rows - side) // 2, (cols - side) // 2
    crop = np.clip(image[r0:r0 + side, c0:c0 + side] * 255 + 0.5, 0, 255).astype(np.uint8)
    return np.asarray(Image.fromarray(crop).resize((size, size), Image.Resampling.LANCZOS))


def _no_op() -> None:
    pass


def _directions(n: int) -> np.ndarray:
    if int(n) != n or n < 1:
        raise ValueError(f"n_directions must be a positive integer, not {n!r}")
    theta = np.pi * (0.5 + np.arange(int(n)) / n)
    return np.column_stack([np.cos(theta), np.sin(theta)])


def _as_bars(bars) -> np.ndarray:
    bars = np.asarray(bars, dtype=np.float64).reshape(-1, 2)
    if not np.all(np.isfinite(bars)):
        raise ValueError("diagrams must be finite (cut essential classes first)")
    return bars


def _sliced(a: np.ndarray, b: np.ndarray, dirs: np.ndarray) -> float:
    return _sliced_sorted(*_projections(a, dirs), *_projections(b, dirs))


def _projections(bars: np.ndarray, dirs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sorted projections of a diagram's points and of their diagonal feet: one row per
    direction (rows are contiguous, which makes the sorts below about twice as fast)."""
    on_diag = np.repeat(bars.sum(axis=1, keepdims=True) / 2.0, 2, axis=1)
    return np.sort(dirs @ bars.T, axis=1), np.sort(dirs @ on_diag.T, axis=1)


def _sliced_sorted(points_a, diag_a, points_b, diag_b) -> float:
    # Each side gets the diagonal projections of the other's points, so both have n_a + n_b
    # points and the 1-D transport is a matching of sorted projections (Carrière et al. 2017).
    left = np.sort(np.concatenate([points_a, diag_b], axis=1), axis=1)
    right = np.sort(np.concatenate([points_b, diag_a], axis=1), axis=1)
    return float(np.abs(left - right).sum(axis=1).mean())
