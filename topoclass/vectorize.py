"""Turn per-image records into feature vectors: scikit-learn transformers over lists of records.

Stage 4 of the pipeline. Each micrograph is summarised by a :class:`PatternRecord` (its persistence
:class:`~topoclass.persistence.Diagrams` and its classic order measures); the transformers here
map a sequence of such records to a 2-D float array, one row per record.

Conventions shared by every transformer in this module
------------------------------------------------------
* ``X`` is a sequence of :class:`PatternRecord` records (a list, tuple or 1-D object array). The
  diagram-based transformers also accept bare ``Diagrams`` records.
* ``__init__`` stores parameters only; ``fit`` learns grids and ranges (attributes ending in
  ``_``); ``transform`` is pure and checks that the transformer is fitted.
* The input is not an array of columns, so ``n_features_in_`` and ``feature_names_in_`` are
  deliberately **not** set, and ``get_feature_names_out`` ignores ``input_features``. The
  scikit-learn tag ``input_tags.two_d_array`` is False for the same reason.
* All persistence values are in units of the site spacing.
* Per-site normalisation: counts, sums, persistence images and Betti curves are divided by the
  number of sites by default (``per_site=True``), so that a larger field of view of the same
  membrane gives the same features. The number of sites is ``diagrams.n_interior`` (the sites
  the kept bars are charged to), else ``diagrams.n_sites``, when the record carries a positive
  value, otherwise ``len(diagrams.h0) + 1`` (every finite H0 bar is one site merging into
  another, plus the one component that never dies).
* Empty diagrams are valid input: their statistics are 0, their images and curves are zero.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
from scipy.special import ndtr
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.pipeline import FeatureUnion
from sklearn.utils.validation import check_is_fitted

from topoclass.errors import TopoclassError
from topoclass.order import ORDER_MEASURE_KEYS
from topoclass.persistence import Diagrams
from topoclass.records import (
    PatternRecord,
    bar_lengths,
    barcode_summary,
    bars_of,
    sites_counted,
)

__all__ = [
    "DEFAULT_ORDER_KEYS",
    "SYMMETRY_KEYS",
    "FEATURE_SETS",
    "BarcodeStatistics",
    "BettiCurveFeatures",
    "FeatureSettingsError",
    "OrderMeasureFeatures",
    "IdealLatticeResiduals",
    "PersistenceImageFeatures",
    "PersistenceLandscapeFeatures",
    "make_features",
]

#: Classic order measures used by default, in this column order: the seven that describe the
#: pattern (the others of :data:`topoclass.order.ORDER_MEASURE_KEYS` describe the acquisition,
#: such as the lattice angle, or repeat these).
DEFAULT_ORDER_KEYS: tuple[str, ...] = ORDER_MEASURE_KEYS[:7]

#: Order measures of the density novelty check: the default ones plus fourfold order (psi4),
#: so that a lattice of another symmetry stands out from every training image.
SYMMETRY_KEYS: tuple[str, ...] = DEFAULT_ORDER_KEYS + ("psi4_local_mean",)

#: Named feature sets accepted by :func:`make_features`.
FEATURE_SETS: dict[str, str] = {
    "two-bar": ("H0 bar-length variance and H1 total bar length per site (zero on an ideal "
                "triangular lattice)"),
    "order": "classic order measures only (psi6, coordination defects, NN spread, Clark-Evans)",
    "topology": "persistence images, landscapes, Betti curves and barcode statistics",
    "all": "topology plus the classic order measures",
}


class FeatureSettingsError(TopoclassError, ValueError):
    """A feature set or transformer parameter is invalid, or a record lacks a needed value."""


class _RecordTransformer(TransformerMixin, BaseEstimator):
    """Shared plumbing: input checks, tags and feature names for transformers over records."""

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        # The input is a list of records, not a 2-D array of numbers.
        tags.input_tags.two_d_array = False
        tags.transformer_tags.preserves_dtype = []
        return tags

    def get_feature_names_out(self, input_features=None) -> np.ndarray:
        """Readable names of the output columns (``input_features`` is ignored: no input columns).

        Returns
        -------
        ndarray of str objects
        """
        check_is_fitted(self, "feature_names_out_")
        return np.asarray(self.feature_names_out_, dtype=object).copy()

    def _output(self, rows: list[np.ndarray]) -> np.ndarray:
        width = len(self.feature_names_out_)
        if not rows:
            return np.zeros((0, width))
        return np.vstack(rows).astype(np.float64, copy=False).reshape(len(rows), width)


class PersistenceImageFeatures(_RecordTransformer):
    """Persistence images (Adams et al., JMLR 2017) of H0 and H1, flattened into features.

    Each bar ``(birth, death)`` becomes the point ``(birth, persistence)``; the image is the sum
    over points of an isotropic Gaussian of standard deviation ``sigma`` (the paper's notation)
    times a weight ``persistence ** weight_exponent``, integrated exactly over each pixel (error
    functions at the pixel edges, vectorised). The tests check the pixels against a reference
    implementation from the package registry. H0 births are all 0, so H0 gives a 1-D profile
    over persistence instead of an image.

    Parameters
    ----------
    pixels : (int, int)
        Number of pixels along birth and along persistence; H0 uses the persistence count only.
    sigma : float
        Standard deviation of the Gaussian, in spacing units. The default 0.1 is about twice the
        RMS site-position error that ``benchmarks/bench_sites.py`` measures at the usual
        spacings and noise (``benchmarks/RESULTS_sites.md``), so bars that differ only by
        position noise
        share a pixel while a vacancy loop (persistence about 0.7) stays apart from noise loops.
    weight_exponent : float
        ``n`` in the weight ``persistence ** n``: 1 is linear in persistence (zero on the
        diagonal, as the paper requires for stability), 0 gives every bar the same weight.
    dims : tuple of int
        Homology dimensions to include, from {0, 1}.
    per_site : bool
        Divide each image by the number of sites.

    Attributes
    ----------
    birth_edges_ : ndarray of shape (pixels[0] + 1,)
        Pixel edges along birth of the H1 image, learned from the training bars: their birth range
        padded by ``sigma`` on each side (never below 0).
    persistence_edges_ : dict of int to ndarray
        Pixel edges along persistence per dimension, from 0 to the largest training persistence
        plus ``sigma``. Bars outside the learned grid at transform time are not an error: the part
        of their Gaussian outside the grid is simply not counted.
    feature_names_out_ : list of str
        ``h0_pimage_p<centre>`` and ``h1_pimage_b<centre>_p<centre>`` (pixel centres).
    """

    def __init__(self, pixels=(10, 10), sigma=0.1, weight_exponent=1.0, dims=(0, 1),
                 per_site=True):
        self.pixels = pixels
        self.sigma = sigma
        self.weight_exponent = weight_exponent
        self.dims = dims
        self.per_site = per_site

    def fit(self, X, y=None):
        """Learn the pixel grid from the range of the training bars."""
        diagrams = _diagrams_of(X, type(self).__name__)
        n_birth, n_pers = _check_pixels(self.pixels)
        sigma = _check_positive(self.sigma, "sigma")
        _check_nonnegative(self.weight_exponent, "weight_exponent")
        dims = _check_dims(self.dims)
        fallback = max(d.max_scale for d in diagrams)
        self.persistence_edges_ = {}
        names: list[str] = []
        for dim in dims:
            bars = np.vstack([bars_of(d, dim) for d in diagrams])
            pers = bars[:, 1] - bars[:, 0]
            top = (float(pers.max()) if pers.size else fallback) + sigma
            self.persistence_edges_[dim] = np.linspace(0.0, top, n_pers + 1)
            p_labels = _grid_labels(_centres(self.persistence_edges_[dim]))
            if dim == 0:
                names += [f"h0_pimage_p{p}" for p in p_labels]
                continue
            if bars.shape[0]:
                low = max(0.0, float(bars[:, 0].min()) - sigma)
                high = float(bars[:, 0].max()) + sigma
            else:
                low, high = 0.0, fallback
            self.birth_edges_ = np.linspace(low, high, n_birth + 1)
            b_labels = _grid_labels(_centres(self.birth_edges_))
            names += [f"h1_pimage_b{b}_p{p}" for b in b_labels for p in p_labels]
        self.feature_names_out_ = names
        return self

    def transform(self, X) -> np.ndarray:
        """Persistence images of each record, flattened (birth-major for H1)."""
        check_is_fitted(self, "feature_names_out_")
        diagrams = _diagrams_of(X, type(self).__name__)
        sigma = float(self.sigma)
        rows = []
        for d in diagrams:
            parts = []
            scale = 1.0 / sites_counted(d) if self.per_site else 1.0
            for dim in sorted(self.persistence_edges_):
                bars = bars_of(d, dim)
                pers = bars[:, 1] - bars[:, 0]
                weight = scale * pers**self.weight_exponent
                p_mass = _pixel_mass(pers, self.persistence_edges_[dim], sigma)
                # einsum, not BLAS matmul: its sums do not depend on the number of threads, so a
                # record gets the same bits in a worker process as in the main one.
                if dim == 0:
                    parts.append(np.einsum("i,ij->j", weight, p_mass))
                else:
                    b_mass = _pixel_mass(bars[:, 0], self.birth_edges_, sigma)
                    parts.append(np.einsum("ij,ik->jk", b_mass * weight[:, None], p_mass).ravel())
            rows.append(np.concatenate(parts))
        return self._output(rows)


class PersistenceLandscapeFeatures(_RecordTransformer):
    """The first ``n_landscapes`` persistence landscapes (Bubenik, JMLR 2015) on a grid of scales.

    ``lambda_k(t)`` is the k-th largest of the tents ``max(0, min(t - birth, death - t))`` over
    the bars. Landscapes are not divided by the number of sites: they are order statistics, not
    sums, though the top ones still grow slowly with the number of bars.

    Parameters
    ----------
    n_landscapes : int
        Number of landscapes ``k = 1 .. n_landscapes``.
    n_points : int
        Number of grid points in ``t``.
    dims : tuple of int
        Homology dimensions, from {0, 1}. The default is H1 only: all H0 bars are born at 0, so
        their top landscapes only see the few longest deaths, which the barcode statistics and
        the H0 image already carry.

    Attributes
    ----------
    grids_ : dict of int to ndarray
        The ``t`` grid per dimension: centres of ``n_points`` equal cells spanning the training
        bars (smallest birth to largest death). Transform outside this span is fine.
    feature_names_out_ : list of str
        ``h1_landscape_k<k>_t<t>``.
    """

    def __init__(self, n_landscapes=3, n_points=20, dims=(1,)):
        self.n_landscapes = n_landscapes
        self.n_points = n_points
        self.dims = dims

    def fit(self, X, y=None):
        """Learn the ``t`` grid from the span of the training bars."""
        diagrams = _diagrams_of(X, type(self).__name__)
        k = _check_count(self.n_landscapes, "n_landscapes")
        n = _check_count(self.n_points, "n_points")
        fallback = max(d.max_scale for d in diagrams)
        self.grids_ = {}
        names: list[str] = []
        for dim in _check_dims(self.dims):
            bars = np.vstack([bars_of(d, dim) for d in diagrams])
            if bars.shape[0]:
                low, high = float(bars[:, 0].min()), float(bars[:, 1].max())
            else:
                low, high = 0.0, fallback
            if high <= low:
                high = low + 1.0
            self.grids_[dim] = _centres(np.linspace(low, high, n + 1))
            labels = _grid_labels(self.grids_[dim])
            names += [f"h{dim}_landscape_k{j + 1}_t{t}" for j in range(k) for t in labels]
        self.feature_names_out_ = names
        return self

    def transform(self, X) -> np.ndarray:
        """Landscape values, landscape-major (all ``t`` of ``k=1``, then ``k=2``, ...)."""
        check_is_fitted(self, "feature_names_out_")
        diagrams = _diagrams_of(X, type(self).__name__)
        k = int(self.n_landscapes)
        rows = []
        for d in diagrams:
            parts = [_landscapes(bars_of(d, dim), self.grids_[dim], k).ravel()
                     for dim in sorted(self.grids_)]
            rows.append(np.concatenate(parts))
        return self._output(rows)


class BettiCurveFeatures(_RecordTransformer):
    """Betti curves ``beta_0(t)`` and ``beta_1(t)``: the number of bars alive at scale ``t``.

    A bar ``(birth, death)`` is alive at ``t`` when ``birth <= t < death``. ``beta_0`` also
    counts the one essential H0 class (the component that never dies), so on a connected pattern
    it falls to 1, not 0; ``beta_0(t)`` is the number of connected components of the graph
    linking sites closer than ``t`` spacings. H1 bars truncated at ``max_scale`` count as alive
    up to ``max_scale``.

    Parameters
    ----------
    n_points : int
        Number of scales.
    t_max : float or None
        Largest scale of the grid, in spacing units; None learns it in ``fit`` as the largest
        ``max_scale`` of the training diagrams.
    dims : tuple of int
        Homology dimensions, from {0, 1}.
    per_site : bool
        Divide the counts by the number of sites.

    Attributes
    ----------
    grid_ : ndarray of shape (n_points,)
        Centres of ``n_points`` equal cells of ``[0, t_max]``.
    feature_names_out_ : list of str
        ``betti0_t<t>``, ``betti1_t<t>``.
    """

    def __init__(self, n_points=25, t_max=None, dims=(0, 1), per_site=True):
        self.n_points = n_points
        self.t_max = t_max
        self.dims = dims
        self.per_site = per_site

    def fit(self, X, y=None):
        """Learn the grid of scales (0 to the training ``max_scale`` unless ``t_max`` is set)."""
        diagrams = _diagrams_of(X, type(self).__name__)
        n = _check_count(self.n_points, "n_points")
        dims = _check_dims(self.dims)
        if self.t_max is None:
            t_max = max(float(d.max_scale) for d in diagrams)
        else:
            t_max = _check_positive(self.t_max, "t_max")
        self.grid_ = _centres(np.linspace(0.0, t_max, n + 1))
        self.dims_ = dims
        labels = _grid_labels(self.grid_)
        self.feature_names_out_ = [f"betti{dim}_t{t}" for dim in dims for t in labels]
        return self

    def transform(self, X) -> np.ndarray:
        """Betti numbers of each record on the learned grid."""
        check_is_fitted(self, "feature_names_out_")
        diagrams = _diagrams_of(X, type(self).__name__)
        rows = []
        for d in diagrams:
            scale = 1.0 / sites_counted(d) if self.per_site else 1.0
            parts = []
            for dim in self.dims_:
                curve = _betti(bars_of(d, dim), self.grid_) + (1.0 if dim == 0 else 0.0)
                parts.append(scale * curve)
            rows.append(np.concatenate(parts))
        return self._output(rows)


class BarcodeStatistics(_RecordTransformer):
    """Summary statistics of H0 and H1 bar lengths (spacing units), one row per record.

    Per dimension: count, total length, mean, variance, max, quantiles and persistent entropy of
    the bar lengths (see :func:`barcode_summary`), then the number of H1 bars truncated at
    ``max_scale``. With ``per_site`` (the default) the size-dependent ones are replaced by
    size-free versions: counts and total lengths per site, and the normalised entropy
    ``E / log n`` instead of ``E`` (which grows like the log of the number of bars).

    Parameters
    ----------
    quantiles : tuple of float
        Quantiles of the bar lengths.
    per_site : bool
        Report counts and total lengths per site (``h1_length_sum_per_site``, ...) and the
        normalised entropy (``h1_entropy_normalised``) instead of the raw values
        (``h1_length_sum``, ``h1_entropy``, ...), which grow with the field of view.

    Attributes
    ----------
    feature_names_out_ : list of str
        For example ``h0_count_per_site``, ``h0_length_variance``, ``h1_length_q0.9``,
        ``h1_entropy_normalised``, ``h1_truncated_per_site``.
    """

    def __init__(self, quantiles=(0.5, 0.9), per_site=True):
        self.quantiles = quantiles
        self.per_site = per_site

    def fit(self, X, y=None):
        """Check the records and fix the column names."""
        _diagrams_of(X, type(self).__name__)
        quantiles = _check_quantiles(self.quantiles)
        extensive = "_per_site" if self.per_site else ""
        names: list[str] = []
        for dim in (0, 1):
            p = f"h{dim}_"
            names += [p + "count" + extensive, p + "length_sum" + extensive,
                      p + "length_mean", p + "length_variance", p + "length_max"]
            names += [f"{p}length_q{q:g}" for q in quantiles]
            names.append(p + ("entropy_normalised" if self.per_site else "entropy"))
        names.append("h1_truncated" + (extensive or "_count"))
        self.quantiles_ = quantiles
        self.feature_names_out_ = names
        return self

    def transform(self, X) -> np.ndarray:
        """Barcode statistics of each record."""
        check_is_fitted(self, "feature_names_out_")
        diagrams = _diagrams_of(X, type(self).__name__)
        rows = []
        for d in diagrams:
            summary = barcode_summary(d, self.quantiles_)
            rows.append(np.array([summary[name] for name in self.feature_names_out_]))
        return self._output(rows)


class IdealLatticeResiduals(_RecordTransformer):
    """The two barcode measures that vanish on an ideal triangular lattice.

    ``h0_length_variance``: in the Rips filtration of an ideal lattice every finite H0 class
    dies at the lattice spacing, so the H0 bar lengths have zero variance.
    ``h1_length_sum_per_site`` (or the raw ``h1_length_sum`` with ``per_site=False``): a Rips
    triangle enters at its longest edge, so on an equilateral lattice every 1-cycle is a
    boundary when it is born and no H1 bar has positive length.

    Parameters
    ----------
    per_site : bool
        Divide the H1 total length by the number of sites.
    """

    def __init__(self, per_site=True):
        self.per_site = per_site

    def fit(self, X, y=None):
        """Check the records and fix the column names."""
        _diagrams_of(X, type(self).__name__)
        h1 = "h1_length_sum_per_site" if self.per_site else "h1_length_sum"
        self.feature_names_out_ = ["h0_length_variance", h1]
        return self

    def transform(self, X) -> np.ndarray:
        """H0 bar-length variance and H1 total bar length of each record."""
        check_is_fitted(self, "feature_names_out_")
        rows = []
        for d in _diagrams_of(X, type(self).__name__):
            h0 = bar_lengths(d, 0)
            h1_sum = float(bar_lengths(d, 1).sum())
            if self.per_site:
                h1_sum /= sites_counted(d)
            rows.append(np.array([h0.var() if h0.size else 0.0, h1_sum]))
        return self._output(rows)


class OrderMeasureFeatures(_RecordTransformer):
    """Classic order measures taken from each record's ``order`` mapping, in a fixed order.

    Parameters
    ----------
    keys : tuple of str
        The measures to use, in column order; defaults to :data:`DEFAULT_ORDER_KEYS`.

    Attributes
    ----------
    feature_names_out_ : list of str
        The keys.

    Notes
    -----
    A value of None becomes NaN and is passed on; a missing key is an error.
    """

    def __init__(self, keys=DEFAULT_ORDER_KEYS):
        self.keys = keys

    def fit(self, X, y=None):
        """Check that every training record has every key."""
        keys = [self.keys] if isinstance(self.keys, str) else list(self.keys)
        if not keys or not all(isinstance(k, str) for k in keys):
            raise FeatureSettingsError(
                f"OrderMeasureFeatures: keys must be a non-empty list of names, not {self.keys!r}"
            )
        if len(set(keys)) != len(keys):
            raise FeatureSettingsError(f"OrderMeasureFeatures: keys repeat a name: {keys}")
        for i, record in enumerate(_pattern_records_of(X)):
            _check_order_keys(record, i, keys)
        self.feature_names_out_ = keys
        return self

    def transform(self, X) -> np.ndarray:
        """The selected order measures of each record."""
        check_is_fitted(self, "feature_names_out_")
        rows = []
        for i, record in enumerate(_pattern_records_of(X)):
            _check_order_keys(record, i, self.feature_names_out_)
            rows.append(np.array([_as_float(record.order[k]) for k in self.feature_names_out_]))
        return self._output(rows)


class AcquisitionContext(_RecordTransformer):
    """How an image was taken, not what it shows: the site spacing in pixels and site density.

    Not a classification feature — every feature above is dimensionless so that one model
    serves all magnifications — but what a model's range check
    (:class:`topoclass.model.RangeNovelty`) compares with its training set: a spacing in pixels
    far outside the training range means another magnification; a low density of sites per
    spacing² (a triangular lattice has 2/√3 ≈ 1.155) means most of the frame holds no lattice,
    as in a photograph of something else.

    Columns: ``spacing_px`` and ``site_density`` (the ``density_per_spacing2`` order measure).
    """

    def fit(self, X, y=None):
        _pattern_records_of(X)
        self.feature_names_out_ = ["spacing_px", "site_density"]
        return self

    def transform(self, X) -> np.ndarray:
        check_is_fitted(self, "feature_names_out_")
        rows = [np.array([float(t.diagrams.spacing),
                          _as_float(t.order.get("density_per_spacing2", np.nan))])
                for t in _pattern_records_of(X)]
        return self._output(rows)


def make_features(name: str = "all", **params) -> FeatureUnion:
    """Build a named feature set as one scikit-learn transformer.

    Parameters
    ----------
    name : str
        One of :data:`FEATURE_SETS`: ``"two-bar"``, ``"order"``, ``"topology"``, ``"all"``.
    **params
        Parameters of the parts, scikit-learn style ``<part>__<parameter>``; the parts are
        ``lattice_residuals`` (two-bar), ``order``, and ``pimage``, ``landscape``, ``betti``,
        ``barcode`` (topology). Example: ``make_features("all", pimage__sigma=0.05)``.

    Returns
    -------
    sklearn.pipeline.FeatureUnion
        Its ``get_feature_names_out`` gives the bare column names (they are unique).
    """
    builders = {
        "two-bar": lambda: [("lattice_residuals", IdealLatticeResiduals())],
        "order": lambda: [("order", OrderMeasureFeatures())],
        "topology": _topology_parts,
        "all": lambda: _topology_parts() + [("order", OrderMeasureFeatures())],
    }
    if name not in builders:
        valid = ", ".join(f'"{n}"' for n in FEATURE_SETS)
        raise FeatureSettingsError(f"unknown feature set {name!r}; choose one of {valid}")
    union = FeatureUnion(builders[name](), verbose_feature_names_out=False)
    if params:
        valid_params = sorted(k for k in union.get_params(deep=True) if "__" in k)
        unknown = sorted(set(params) - set(valid_params))
        if unknown:
            raise FeatureSettingsError(
                f"feature set {name!r} has no parameter {', '.join(unknown)}; "
                f"valid: {', '.join(valid_params)}"
            )
        union.set_params(**params)
    return union


# --- private helpers --------------------------------------------------------------------------


def _topology_parts() -> list[tuple[str, TransformerMixin]]:
    return [
        ("pimage", PersistenceImageFeatures()),
        ("landscape", PersistenceLandscapeFeatures()),
        ("betti", BettiCurveFeatures()),
        ("barcode", BarcodeStatistics()),
    ]


def _records(X, who: str) -> list:
    if isinstance(X, (PatternRecord, Diagrams, str, bytes, Mapping)):
        raise FeatureSettingsError(f"{who}: X must be a list of PatternRecord records, not one "
                                   f"{type(X).__name__}; wrap it in a list")
    if isinstance(X, np.ndarray) and X.ndim != 1:
        raise FeatureSettingsError(
            f"{who}: X must be a list (or 1-D object array) of PatternRecord records, not a "
            f"{X.ndim}-D array of shape {X.shape}; build PatternRecord records first"
        )
    try:
        records = list(X)
    except TypeError:
        raise FeatureSettingsError(
            f"{who}: X must be a list of PatternRecord records, not {type(X).__name__}"
        ) from None
    return records


def _diagrams_of(X, who: str) -> list[Diagrams]:
    out = []
    for i, record in enumerate(_records(X, who)):
        if isinstance(record, PatternRecord):
            out.append(record.diagrams)
        elif isinstance(record, Diagrams):
            out.append(record)
        else:
            raise FeatureSettingsError(
                f"{who}: item {i} of X is a {type(record).__name__}, not a PatternRecord record"
            )
    if not out:
        raise FeatureSettingsError(f"{who}: X holds no records; give at least one image")
    return out


def _pattern_records_of(X) -> list[PatternRecord]:
    records = _records(X, "OrderMeasureFeatures")
    for i, record in enumerate(records):
        if not isinstance(record, PatternRecord):
            raise FeatureSettingsError(
                f"OrderMeasureFeatures: item {i} of X is a {type(record).__name__}, not a "
                "PatternRecord record (order measures live in PatternRecord.order)"
            )
    if not records:
        raise FeatureSettingsError("OrderMeasureFeatures: X holds no records")
    return records


def _check_order_keys(record: PatternRecord, index: int, keys) -> None:
    missing = [k for k in keys if k not in record.order]
    if missing:
        where = record.source or f"record {index}"
        have = ", ".join(sorted(record.order)) or "none"
        raise FeatureSettingsError(
            f"{where}: order measures {', '.join(missing)} are missing (the record has {have}); "
            "recompute the order measures or choose other keys"
        )


def _as_float(value) -> float:
    return np.nan if value is None else float(value)


def _pixel_mass(centres: np.ndarray, edges: np.ndarray, sigma: float) -> np.ndarray:
    """Mass of a 1-D Gaussian (one per centre) in each cell between consecutive edges."""
    cdf = ndtr((edges[None, :] - centres[:, None]) / sigma)
    return np.diff(cdf, axis=1)


def _landscapes(bars: np.ndarray, t: np.ndarray, k: int) -> np.ndarray:
    """The k largest tents at each t, in descending order: shape (k, len(t))."""
    n = bars.shape[0]
    if n == 0:
        return np.zeros((k, t.size))
    tents = np.minimum(t[None, :] - bars[:, :1], bars[:, 1:] - t[None, :])
    np.maximum(tents, 0.0, out=tents)
    if n > k:
        tents = np.partition(tents, n - k, axis=0)[n - k:]
    else:
        tents = np.vstack([tents, np.zeros((k - n, t.size))])
    return -np.sort(-tents, axis=0)


def _betti(bars: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Number of bars with birth <= t < death at each t."""
    born = np.searchsorted(np.sort(bars[:, 0]), t, side="right")
    # A bar with death <= t was also born by t (birth <= death), so the difference counts the
    # bars alive at t.
    dead = np.searchsorted(np.sort(bars[:, 1]), t, side="right")
    return (born - dead).astype(np.float64)


def _centres(edges: np.ndarray) -> np.ndarray:
    return 0.5 * (edges[:-1] + edges[1:])


def _grid_labels(values: np.ndarray) -> list[str]:
    # Two decimals read best; use more only when needed to keep the names unique.
    for decimals in range(2, 9):
        labels = [f"{v:.{decimals}f}" for v in values]
        if len(set(labels)) == len(labels):
            return labels
    return [repr(float(v)) for v in values]


def _check_dims(dims) -> tuple[int, ...]:
    try:
        out = tuple(sorted({int(d) for d in dims}))
    except (TypeError, ValueError):
        out = ()
    if not out or not set(out) <= {0, 1}:
        raise FeatureSettingsError(f"dims must be a non-empty subset of (0, 1), not {dims!r}")
    return out


def _check_pixels(pixels) -> tuple[int, int]:
    try:
        n_birth, n_pers = (int(r) for r in pixels)
    except (TypeError, ValueError):
        n_birth = n_pers = 0
    if n_birth < 1 or n_pers < 1:
        raise FeatureSettingsError(
            f"pixels must be two positive pixel counts (birth, persistence), not "
            f"{pixels!r}"
        )
    return n_birth, n_pers


def _check_count(value, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise FeatureSettingsError(f"{name} must be a positive integer, not {value!r}")
    return int(value)


def _check_positive(value, name: str) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        out = np.nan
    if not np.isfinite(out) or out <= 0:
        raise FeatureSettingsError(f"{name} must be a positive number, not {value!r}")
    return out


def _check_nonnegative(value, name: str) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        out = np.nan
    if not np.isfinite(out) or out < 0:
        raise FeatureSettingsError(f"{name} must be a number >= 0, not {value!r}")
    return out


def _check_quantiles(quantiles) -> tuple[float, ...]:
    try:
        out = tuple(float(q) for q in quantiles)
    except (TypeError, ValueError):
        out = (np.nan,)
    if not all(0.0 <= q <= 1.0 for q in out):
        raise FeatureSettingsError(f"quantiles must lie in [0, 1], not {quantiles!r}")
    if len({f"{q:g}" for q in out}) != len(out):
        raise FeatureSettingsError(f"quantiles repeat a value: {quantiles!r}")
    return out
