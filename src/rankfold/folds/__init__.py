"""Pass states: one small class per pass, each mergeable and serializable."""

from rankfold.folds.base import FoldState, tree_merge
from rankfold.folds.feature_gram import ColumnMoments, FeatureGram
from rankfold.folds.sample_gram import FeatureProjection, SampleGram
from rankfold.folds.scores import ColumnScores, RowScores
from rankfold.folds.sketch import CovarianceProduct, GramProduct, StreamingSketch

__all__ = ["FoldState", "tree_merge", "FeatureGram", "ColumnMoments", "SampleGram", "FeatureProjection",
           "CovarianceProduct", "GramProduct", "StreamingSketch", "RowScores", "ColumnScores"]
