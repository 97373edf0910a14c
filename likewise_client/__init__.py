"""A Python client for the likewise service (HTTP only: it imports nothing of the service).

>>> from likewise_client import Client
>>> with Client("http://127.0.0.1:8000", token) as lw:          # doctest: +SKIP
...     lw.put_metric("shipments", ["peak_temp_c", "minutes_above_8c", "trip_km"])
...     lw.post_batch("shipments", frame, groups="cause")
...     fit = lw.wait_for_fit(lw.start_fit("shipments")["fit_id"], timeout=120)
...     lw.post_stats("shipments", stats_from_frame(big, features, "cause"))

See the README's "From Python" section.
"""

from .batch_stats import stats_from_dask, stats_from_frame
from .bodies import ARROW, FORMATS, JSON, BodyFormat, Table, to_table
from .client import ENDED, NO_RETRY, Answer, Client, RetryPolicy, new_key
from .errors import (
    ClientError,
    FieldError,
    FitTimeout,
    GroupingRunTimeout,
    ProblemError,
    Unreachable,
)

__all__ = [
    "ARROW", "JSON", "stats_from_dask", "stats_from_frame",
    "ENDED", "FORMATS", "NO_RETRY", "Answer", "BodyFormat", "Client", "ClientError",
    "FieldError", "FitTimeout", "GroupingRunTimeout", "ProblemError", "RetryPolicy", "Table",
    "Unreachable",
    "new_key", "to_table",
]
