"""See what the model sees: figures (matplotlib, Agg) and the offline HTML batch report.

The last stage of the pipeline; it may read every stage to its left and draws what they made:

* ``figures`` — inspection pictures of one micrograph (sites by Delaunay coordination, the
  persistence diagram and barcode, the defect map of :mod:`topoclass.defects`) and the
  training and validation figures (confusion matrix, reliability diagram, per-class bars,
  feature importance);
* ``importance`` — permutation importance of a trained model's features;
* ``batch_page`` — one self-contained HTML page beside a ``scores.csv``;
* ``detail_view`` — the light view of one image in that page (SVG layers over one JPEG);
* ``map_view`` — ``map.png`` and ``map.html`` of a map folder (:mod:`topoclass.mapping`).

``site_coordination`` and ``coordination_class`` are :mod:`topoclass.order`'s, named here too.
"""

from topoclass.defects import (
    DEFECT_COLUMNS,
    GAP_FLOOR,
    LOOP_FLOOR,
    defect_counts,
    locate_defects,
    write_defects_csv,
)
from topoclass.order import coordination_class, site_coordination
from topoclass.report.batch_page import (
    MAX_DETAILS,
    MAX_THUMBNAILS,
    batch_report_paths,
    most_doubtful_first,
    write_batch_report,
)
from topoclass.report.figures import (
    CLASS_COLOURS,
    COORDINATION_COLOURS,
    DEFECT_COLOURS,
    MAX_DRAWN_DEFECTS,
    diagram_and_barcode_figure,
    image_to_figure_pixels,
    plot_confusion,
    plot_defects,
    plot_grains,
    plot_importance,
    plot_per_class,
    plot_reliability,
    plot_sites,
    save_figure,
    write_inspection_figures,
    write_metric_figures,
    write_training_figures,
)
from topoclass.report.importance import feature_family, feature_importance

__all__ = [
    "CLASS_COLOURS", "COORDINATION_COLOURS", "DEFECT_COLOURS", "DEFECT_COLUMNS", "GAP_FLOOR",
    "LOOP_FLOOR", "MAX_DETAILS", "MAX_DRAWN_DEFECTS", "coordination_class", "defect_counts",
    "MAX_THUMBNAILS", "batch_report_paths", "diagram_and_barcode_figure", "feature_family",
    "feature_importance", "image_to_figure_pixels", "locate_defects", "most_doubtful_first",
    "plot_confusion",
    "plot_defects", "plot_grains",
    "plot_importance", "plot_per_class", "plot_reliability", "plot_sites", "save_figure",
    "site_coordination", "write_batch_report", "write_defects_csv", "write_inspection_figures",
    "write_metric_figures", "write_training_figures",
]
