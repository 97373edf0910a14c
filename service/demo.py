"""``likewise demo``: drive a running service through the whole flow with invented data.

Creates the metric ``demo-cold-chain``, posts labelled weeks of the invented
cold-chain scenario (service/demo_data.py), fits, waits for the version, then groups
held-out weeks with the learned metric and with a Euclidean version and prints the
adjusted Rand index of each against the analysts' grouping.
"""

from __future__ import annotations

from pathlib import Path

from sklearn.metrics import adjusted_rand_score

from likewise_client import Client, ClientError, FitTimeout, ProblemError, Unreachable

from .demo_data import FEATURES, make_weeks

METRIC = "demo-cold-chain"
HELD_OUT_WEEKS = 4
FIT_WAIT_SECONDS = 300.0


class DemoError(RuntimeError):
    pass


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


def _fit(client: Client, body: dict) -> dict:
    fit = client.start_fit(METRIC, **body)
    try:
        fit = client.wait_for_fit(fit["fit_id"], timeout=FIT_WAIT_SECONDS)
    except FitTimeout as exc:
        raise DemoError(f"{exc} — is a worker running?") from exc
    if fit["status"] != "succeeded":
        raise DemoError(f"fit failed: {fit.get('error')}")
    return fit


# what the two scores printed below mean, said in the demo's own output
SCORE_CV = (
    "  (score 1: the fit's own estimate. It hid each posted week in turn, learned the\n"
    "  metric from the other weeks, grouped the hidden week with k-means at the\n"
    "  analysts' number of groups and compared with their grouping by adjusted Rand\n"
    "  index: 1 = the same grouping, 0 = no better than chance. The Euclidean figure\n"
    "  is the same procedure on standardised features with no learning.)")
SCORE_FRESH = (
    "  (score 2: a check on weeks the service never saw. Each week is grouped with\n"
    "  the learned version and with the Euclidean version, and each grouping is\n"
    "  compared with the analysts' by adjusted Rand index, computed here by\n"
    "  scikit-learn, not by the service.)")


def run_demo(
    url: str | None = None, token: str | None = None, weeks: int = 16, seed: int = 7
) -> int:
    base = url or _default_url()
    with Client(base, token or _default_token()) as client:
        try:
            return _run(client, weeks, seed)
        except Unreachable as exc:
            raise DemoError(
                f"{exc}; is `likewise run` serving there? Pass --url or set "
                "LIKEWISE_HOST/LIKEWISE_PORT as for `likewise run`") from exc
        except ClientError as exc:
            raise DemoError(str(exc)) from exc


def _run(client: Client, weeks: int, seed: int) -> int:
    data = make_weeks(weeks + HELD_OUT_WEEKS, seed=seed)
    train, held_out = data[:weeks], data[weeks:]

    try:
        client.delete_metric(METRIC)
    except ProblemError as exc:
        if exc.status != 404:
            raise
    client.put_metric(METRIC, FEATURES,
                      "Invented demo: cold-chain shipments grouped by excursion cause")
    print(f"created metric {METRIC!r} with {len(FEATURES)} features")
    for i, (X, labels) in enumerate(train):
        if i % 2 == 0:  # both input forms, to show them
            records = [dict(zip(FEATURES, row, strict=True)) for row in X.tolist()]
            client.post_batch(METRIC, records, labels)
        else:
            client.post_batch(METRIC, X, labels, columns=FEATURES)
    print(f"posted {len(train)} labelled weeks ({sum(len(y) for _, y in train)} shipments)")

    learned = _fit(client, {"method": "auto", "activate": "at_once"})
    baseline = _fit(client, {"method": "euclidean", "activate": "by_hand"})
    version = client.get_version(METRIC, learned["version"])
    print(f"fit {learned['fit_id']}: version {learned['version']} "
          f"(method {version['method']}, rank {version['rank']}); "
          f"Euclidean reference is version {baseline['version']}")
    score = version["score"]
    print(f"cross-validated held-out ARI: learned {score['ari']:.3f} vs Euclidean "
          f"{score['baseline_ari']:.3f}")
    print(SCORE_CV)

    print("\nheld-out weeks (never posted), grouped at the analysts' k:")
    print(SCORE_FRESH)
    print(f"{'week':>4}  {'shipments':>9}  {'k':>2}  {'ARI learned':>11}  {'ARI Euclidean':>13}")
    rows = []
    for i, (X, labels) in enumerate(held_out, start=1):
        k = len(set(labels))
        scores = []
        for v in (learned["version"], baseline["version"]):
            out = client.group(METRIC, X, k, version=v, columns=FEATURES)
            scores.append(adjusted_rand_score(labels, out["labels"]))
        rows.append(scores)
        print(f"{i:>4}  {len(labels):>9}  {k:>2}  {scores[0]:>11.3f}  {scores[1]:>13.3f}")
    mean_learned = sum(r[0] for r in rows) / len(rows)
    mean_base = sum(r[1] for r in rows) / len(rows)
    print(f"{'mean':>4}  {'':>9}  {'':>2}  {mean_learned:>11.3f}  {mean_base:>13.3f}")
    verdict = "better than" if mean_learned > mean_base else "NOT better than"
    print(f"\nthe learned metric groups held-out weeks {verdict} plain Euclidean k-means")
    return 0
