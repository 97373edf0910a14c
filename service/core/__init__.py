"""The pure maths core of likewise: numpy, scipy and scikit-learn only.

Nothing here imports flask, redis, rq or marshmallow (a test checks it).
"""

from .errors import CoreError, NotEnoughDataError, RecordOverflowError, ZeroSpreadWarning
from .grouping import Grouping, group_records
from .learners import METHODS, fit_metric
from .metric import FittedMetric
from .optimal1d import kmeans_1d
from .scores import agreement
from .selection import MetricSelector
from .stats import BatchStats
from .validation import check_batch, check_k, check_matrix

__all__ = [
    "METHODS",
    "BatchStats",
    "CoreError",
    "FittedMetric",
    "Grouping",
    "MetricSelector",
    "NotEnoughDataError",
    "RecordOverflowError",
    "ZeroSpreadWarning",
    "agreement",
    "check_batch",
    "check_k",
    "check_matrix",
    "fit_metric",
    "group_records",
    "kmeans_1d",
]
