"""The classifiers a model can be built on, and the default: plain data, no scikit-learn.

Kept apart from :mod:`topoclass.model.pipeline` so that the command line can show them in its
help, and take its default from here, without importing scikit-learn on every call.
"""

from __future__ import annotations

# Small labelled sets (20–60 images per class) with a few hundred correlated features are the
# normal case. A random forest needs no feature scaling, is insensitive to many redundant or
# useless columns (it picks splits feature by feature) and averages 300 trees, so its
# probabilities are smooth. A logistic fit (C=1) on a few hundred features and ~100 images
# separates the classes linearly and becomes overconfident on its mistakes. `topoclass train
# --select` measures the classifiers against each other on the user's own labelled set.
DEFAULT_CLASSIFIER = "forest"


CLASSIFIERS: dict[str, str] = {
    "logistic": "multinomial logistic regression, L2 penalty, C=1 (few features, e.g. 'order')",
    "forest": "random forest, 300 trees (default: robust on small sets with many features)",
    "boosting": "gradient boosting, 150 depth-2 trees, learning rate 0.1, subsample 0.8",
    "svm": "RBF support-vector machine; probabilities come from the calibration step",
}
