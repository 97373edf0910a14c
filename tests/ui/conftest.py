"""Fixtures of the console tests, borrowed from the API and client tests: the app on a
real Redis with a spec-checking client and burst workers (``tests/api``), and the live
service over real HTTP with a ``likewise worker`` subprocess (``tests/client``)."""

from __future__ import annotations

from tests.api.conftest import api, app, fit_to_version, fitted, metric, with_batches
from tests.client.conftest import live, metric_name

__all__ = ["api", "app", "fit_to_version", "fitted", "live", "metric", "metric_name",
           "with_batches"]
