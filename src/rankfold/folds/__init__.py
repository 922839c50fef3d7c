"""Pass states: one small class per pass, each mergeable and serializable."""

from rankfold.folds.base import FoldState, tree_merge
from rankfold.folds.feature_gram import ColumnMeans, FeatureGram
from rankfold.folds.sample_gram import FeatureProjection, SampleGram

__all__ = ["FoldState", "tree_merge", "FeatureGram", "ColumnMeans", "SampleGram", "FeatureProjection"]
