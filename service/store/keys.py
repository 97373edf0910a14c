"""Every Redis key of likewise, under one configurable prefix (the only place names live).

Key layout (``P`` = the deployment's key prefix; metric names follow the rule of
``service/usecases/params.py``, so they never contain ``:``)::

    P:metrics                       set    metric names
    P:metric:{name}                 hash   features (JSON), description, created_at,
                                           updated_at, uid (changes when re-created)
    P:metric:{name}:records         string records in all batches (INCRBY/DECRBY)
    P:metric:{name}:batches         zset   batch ids, scored by ingest order
    P:metric:{name}:batch:{id}      hash   meta (JSON), stats (BatchStats.to_bytes()),
                                           matrix (codecs.pack_matrix), labels (codecs.pack_json);
                                           both empty for a statistics-only batch
    P:metric:{name}:content         hash   content hash (sha256) → batch id
    P:metric:{name}:vseq            string version counter (INCR; a crashed fit leaves a gap)
    P:metric:{name}:versions        zset   visible version numbers
    P:metric:{name}:version:{n}     hash   summary, report, metric, batches (JSON), fit_id, parent
    P:metric:{name}:version:{n}:reference
                                    string drift reference of version n: bin layouts and
                                           the summary of its training batches (pack_json);
                                           written in the version's own transaction
    P:metric:{name}:drift:{uid}:{n}:{hour}
                                    hash   drift summary of the records grouped with version
                                           n in one UTC hour (hours since the epoch): n,
                                           requests, mean, m2 (per feature) and counts
                                           (every bin), comma-separated text; expires
                                           LIKEWISE_DRIFT_HOURS after its hour ends; {uid}
                                           is the metric's, so a re-created metric starts afresh
    P:metric:{name}:active          string active version number
    P:metric:{name}:history         list   activations (JSON), oldest first
    P:metric:{name}:fits            zset   fit ids of this metric, by creation time
    P:metric:{name}:dedupe:{hash}   string fit id of a waiting/running fit with these params
    P:metric:{name}:runs            zset   ids of this metric's grouping runs, scored by
                                           when the run's record expires (+inf while it
                                           is live); pruned as runs are created; deleting
                                           the metric deletes every run not yet expired
    P:fit:{fit_id}                  hash   fit record fields (JSON values)
    P:fit:{fit_id}:lease            string job id of the attempt running it (expires unless renewed)
    P:live-fits                     set    ids of waiting and running fits (what the warden checks)
    P:grun:{run_id}                 hash   grouping run record fields (JSON values);
                                           expires LIKEWISE_RUN_RESULT_HOURS after it ends
    P:grun:{run_id}:in:{i}          string records i·65536… of a waiting run (pack_matrix);
                                           deleted when the run ends
    P:grun:{run_id}:ids:{i}         string the id column of chunk i (pack_json), if any;
                                           expires with the record
    P:grun:{run_id}:out:{i}         string results of chunk i: label, distance, margin
                                           per record (pack_matrix); expires with the record
    P:grun:{run_id}:lease           string job id of the attempt grouping it (expires unless
                                           renewed)
    P:live-gruns                    set    ids of waiting and grouping runs (the warden checks)
    P:idem:{digest}                 string a stored answer to an Idempotency-Key (expires)
    P:batchseq                      string ingest order of batches (INCR)
    P:tallies                       hash   deployment-wide counters read by /metrics:
                                           fits:{outcome} (fits that ended so),
                                           fit-seconds:{outcome} (their run time, summed),
                                           fit-bucket:{outcome}:{i} (ended within bucket i),
                                           activations:{by} (versions made active)
"""

from __future__ import annotations

# per-metric keys with a fixed name (deleted with the metric; reset when it is re-created)
METRIC_SCALARS = ("records", "vseq", "active", "history", "content")


class Keys:
    """Key names of one deployment (``prefix``)."""

    def __init__(self, prefix: str) -> None:
        self.prefix = prefix

    def join(self, *parts: object) -> str:
        return ":".join([self.prefix, *map(str, parts)])

    # ---- metrics -------------------------------------------------------------------
    def metric_names(self) -> str:
        return self.join("metrics")

    def metric(self, name: str, *parts: object) -> str:
        return self.join("metric", name, *parts)

    def records(self, name: str) -> str:
        return self.metric(name, "records")

    # ---- batches -------------------------------------------------------------------
    def batch_index(self, name: str) -> str:
        return self.metric(name, "batches")

    def batch(self, name: str, batch_id: str) -> str:
        return self.metric(name, "batch", batch_id)

    def content(self, name: str) -> str:
        return self.metric(name, "content")

    def batch_seq(self) -> str:
        return self.join("batchseq")

    # ---- versions ------------------------------------------------------------------
    def version_seq(self, name: str) -> str:
        return self.metric(name, "vseq")

    def version_index(self, name: str) -> str:
        return self.metric(name, "versions")

    def version(self, name: str, n: int | str) -> str:
        return self.metric(name, "version", n)

    def active(self, name: str) -> str:
        return self.metric(name, "active")

    def history(self, name: str) -> str:
        return self.metric(name, "history")

    def drift_reference(self, name: str, n: int | str) -> str:
        return self.metric(name, "version", n, "reference")

    # ---- drift -----------------------------------------------------------------------
    def drift_bucket(self, name: str, uid: str, n: int, hour: int) -> str:
        return self.metric(name, "drift", uid, n, hour)

    # ---- fits ----------------------------------------------------------------------
    def fit_index(self, name: str) -> str:
        return self.metric(name, "fits")

    def dedupe(self, name: str, params_hash: str) -> str:
        return self.metric(name, "dedupe", params_hash)

    def fit(self, fit_id: str) -> str:
        return self.join("fit", fit_id)

    def lease(self, fit_id: str) -> str:
        return self.join("fit", fit_id, "lease")

    def live_fits(self) -> str:
        return self.join("live-fits")

    # ---- grouping runs (large tables grouped by workers) ------------------------------
    def run(self, run_id: str) -> str:
        return self.join("grun", run_id)

    def run_keys(self, run_id: str, n_chunks: int) -> list[str]:
        """Every key of a run of ``n_chunks`` chunks: its record, lease, inputs, ids
        and results."""
        keys = [self.run(run_id), self.run_lease(run_id)]
        for i in range(n_chunks):
            keys += [self.run_input(run_id, i), self.run_ids(run_id, i),
                     self.run_output(run_id, i)]
        return keys

    def run_index(self, name: str) -> str:
        """The ids of a metric's grouping runs, scored by when each run's record
        expires (+inf while the run is live)."""
        return self.metric(name, "runs")

    def run_input(self, run_id: str, chunk: int) -> str:
        return self.join("grun", run_id, "in", chunk)

    def run_ids(self, run_id: str, chunk: int) -> str:
        return self.join("grun", run_id, "ids", chunk)

    def run_output(self, run_id: str, chunk: int) -> str:
        return self.join("grun", run_id, "out", chunk)

    def run_lease(self, run_id: str) -> str:
        return self.join("grun", run_id, "lease")

    def live_runs(self) -> str:
        return self.join("live-gruns")

    # ---- retried requests ------------------------------------------------------------
    def idempotency(self, digest: str) -> str:
        return self.join("idem", digest)

    # ---- deployment-wide counters (telemetry) -----------------------------------------
    def tallies(self) -> str:
        return self.join("tallies")
