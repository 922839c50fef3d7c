"""Exact against randomized components on a subset, and two stored results against each other.

Modules: ``subset`` (the reproducible two-stage draw and holding the subset),
``settings`` (randomized settings and their text syntax), ``metrics``
(per-component angles, eigenvalue errors, score correlations, the error left
outside), ``engine`` (:func:`compare_subset`, :func:`compare_results`),
``output`` (the report folder, written atomically).
"""

from rankfold.compare.engine import DEFAULT_TARGET_ANGLE, compare_subset
from rankfold.compare.results import compare_results
from rankfold.compare.settings import Setting, parse_settings
from rankfold.compare.subset import draw_subset, parse_fraction

__all__ = ["compare_subset", "compare_results", "DEFAULT_TARGET_ANGLE", "Setting", "parse_settings",
           "draw_subset", "parse_fraction"]
