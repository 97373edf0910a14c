"""``likewise demo``: drive a running service through the whole flow with invented data.

Creates the metric ``demo-cold-chain``, posts labelled weeks of the invented
cold-chain scenario (service/demo_data.py), fits, waits for the version, then groups
held-out weeks with the learned metric and with a Euclidean version and prints the
adjusted Rand index of each against the analysts' grouping.
"""

from __future__ import annotations

import json
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

from sklearn.metrics import adjusted_rand_score

from .demo_data import FEATURES, make_weeks

METRIC = "demo-cold-chain"
HELD_OUT_WEEKS = 4
FIT_WAIT_SECONDS = 300.0


class DemoError(RuntimeError):
    pass


class Client:
    """A minimal JSON client over urllib (the demo needs nothing more)."""

    def __init__(self, base_url: str, token: str) -> None:
        self.base_url = base_url.rstrip("/")
        self.token = token

    def call(self, method: str, path: str, body: Any = None) -> tuple[int, Any]:
        data = None if body is None else json.dumps(body).encode()
        req = urllib.request.Request(self.base_url + path, data=data, method=method)
        req.add_header("Authorization", f"Bearer {self.token}")
        if data is not None:
            req.add_header("Content-Type", "application/json")
        try:
            with urllib.request.urlopen(req, timeout=60) as resp:
                raw = resp.read()
                return resp.status, (json.loads(raw) if raw else None)
        except urllib.error.HTTPError as exc:
            raw = exc.read()
            try:
                payload = json.loads(raw)
            except ValueError:
                payload = raw.decode(errors="replace")
            return exc.code, payload
        except urllib.error.URLError as exc:
            raise DemoError(
                f"cannot reach {self.base_url} ({exc.reason}); is `likewise run` serving "
                "there? Pass --url or set LIKEWISE_HOST/LIKEWISE_PORT as for `likewise run`"
            ) from exc

    def expect(self, method: str, path: str, body: Any = None, ok=(200, 201, 202, 204)) -> Any:
        status, payload = self.call(method, path, body)
        if status not in ok:
            raise DemoError(f"{method} {path} answered {status}: {payload}")
        return payload


def _default_token() -> str:
    from .config import Settings
    from .launcher import TOKEN_FILE

    settings = Settings.from_env()
    if settings.admin_token:
        return settings.admin_token
    path = Path(settings.data_dir) / TOKEN_FILE
    if path.exists():
        return path.read_text().strip()
    raise DemoError(
        f"no token: {path} does not exist; pass --token, set LIKEWISE_ADMIN_TOKEN, or run "
        "the demo from the directory where `likewise run` keeps its data (LIKEWISE_DATA_DIR)"
    )


def _default_url() -> str:
    from .config import Settings

    settings = Settings.from_env()  # the same host and port as `likewise run`
    return f"http://{settings.host}:{settings.port}"


def _wait_for_fit(client: Client, fit_id: str) -> dict:
    deadline = time.monotonic() + FIT_WAIT_SECONDS
    while time.monotonic() < deadline:
        fit = client.expect("GET", f"/v1/fits/{fit_id}")
        if fit["status"] in ("succeeded", "failed"):
            return fit
        time.sleep(0.5)
    raise DemoError(
        f"fit {fit_id} did not finish within {FIT_WAIT_SECONDS:.0f}s — is a worker running?"
    )


def _fit(client: Client, body: dict) -> dict:
    fit = client.expect("POST", f"/v1/metrics/{METRIC}/fits", body)
    fit = _wait_for_fit(client, fit["fit_id"])
    if fit["status"] != "succeeded":
        raise DemoError(f"fit failed: {fit.get('error')}")
    return fit


def run_demo(
    url: str | None = None, token: str | None = None, weeks: int = 16, seed: int = 7
) -> int:
    client = Client(url or _default_url(), token or _default_token())
    data = make_weeks(weeks + HELD_OUT_WEEKS, seed=seed)
    train, held_out = data[:weeks], data[weeks:]

    status, _ = client.call("GET", f"/v1/metrics/{METRIC}")
    if status == 200:
        client.expect("DELETE", f"/v1/metrics/{METRIC}")
    client.expect("PUT", f"/v1/metrics/{METRIC}", {
        "features": FEATURES,
        "description": "Invented demo: cold-chain shipments grouped by excursion cause",
    })
    print(f"created metric {METRIC!r} with {len(FEATURES)} features")
    for i, (X, labels) in enumerate(train):
        if i % 2 == 0:  # both payload forms, to show them
            records = [dict(zip(FEATURES, row, strict=True)) for row in X.tolist()]
            body = {"records": records, "groups": labels}
        else:
            body = {"columns": FEATURES, "rows": X.tolist(), "groups": labels}
        client.expect("POST", f"/v1/metrics/{METRIC}/batches", body)
    print(f"posted {len(train)} labelled weeks ({sum(len(y) for _, y in train)} shipments)")

    learned = _fit(client, {"method": "auto", "activate": "always"})
    baseline = _fit(client, {"method": "euclidean", "activate": "never"})
    version = client.expect("GET", f"/v1/metrics/{METRIC}/versions/{learned['version']}")
    print(f"fit {learned['fit_id']}: version {learned['version']} "
          f"(method {version['method']}, rank {version['rank']}); "
          f"Euclidean reference is version {baseline['version']}")
    score = version["score"]
    print(f"cross-validated held-out ARI: learned {score['ari']:.3f} vs Euclidean "
          f"{score['baseline_ari']:.3f}")

    print("\nheld-out weeks (never posted), grouped at the analysts' k:")
    print(f"{'week':>4}  {'shipments':>9}  {'k':>2}  {'ARI learned':>11}  {'ARI Euclidean':>13}")
    rows = []
    for i, (X, labels) in enumerate(held_out, start=1):
        k = len(set(labels))
        scores = []
        for v in (learned["version"], baseline["version"]):
            out = client.expect("POST", f"/v1/metrics/{METRIC}/groupings",
                                {"columns": FEATURES, "rows": X.tolist(), "k": k, "version": v})
            scores.append(adjusted_rand_score(labels, out["labels"]))
        rows.append(scores)
        print(f"{i:>4}  {len(labels):>9}  {k:>2}  {scores[0]:>11.3f}  {scores[1]:>13.3f}")
    mean_learned = sum(r[0] for r in rows) / len(rows)
    mean_base = sum(r[1] for r in rows) / len(rows)
    print(f"{'mean':>4}  {'':>9}  {'':>2}  {mean_learned:>11.3f}  {mean_base:>13.3f}")
    verdict = "better than" if mean_learned > mean_base else "NOT better than"
    print(f"\nthe learned metric groups held-out weeks {verdict} plain Euclidean k-means")
    return 0
