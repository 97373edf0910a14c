"""likewise: learn from hand-grouped batches a metric that makes k-means group records alike."""

__version__ = "0.1.0"
