"""A mixed fleet under one coordinator: two SQLite nodes, a Redis agent and a PostgreSQL agent.

Applications write Redis (redis-py) and PostgreSQL (psycopg2) directly and the SQLite nodes
through their storage API; then `shardsieve loadtest --reuse` reads every store's keys through
the coordinator. Checks: no false negative, and the measured probes per lookup inside the
report's own binomial interval around the prediction from the fleet's filters (an exact
binomial region at 99.9%, docs/loadtest.md), for existing and absent keys alike — the agents'
filters predict their wasted probes as well as the nodes' do.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from shardsieve.localcluster import LocalCluster
from shardsieve.testing.agent_oracle import not_routed_to
from shardsieve.testing.procs import wait_until
from shardsieve.testing.servers import start_postgres, start_redis
from shardsieve.v1 import storage_pb2

pytestmark = pytest.mark.cluster
KEYS_PER_STORE = 800


def test_loadtest_over_sqlite_nodes_and_redis_and_postgres_agents(tmp_path: Path) -> None:
    redis_server = start_redis(tmp_path, {"notify-keyspace-events": "Egxen"})
    pg = start_postgres()
    try:
        pg.execute("CREATE ROLE kelp_agent LOGIN REPLICATION")
        pg.execute("CREATE DATABASE cooperative OWNER kelp_agent")
        pg.execute("CREATE TABLE harvest (tag text PRIMARY KEY, note text)", dbname="cooperative", user="kelp_agent")
        redis_server.client().mset({f"cache:crate:{i}".encode(): b"dulse 12 kg" for i in range(KEYS_PER_STORE)})
        pg.execute("INSERT INTO harvest SELECT 'ledger:bed-' || g, 'sugar-kelp 40 kg' FROM generate_series(1, %s) g",
                   (KEYS_PER_STORE,), dbname="cooperative")
        pg_url = pg.url("cooperative", "kelp_agent", table="harvest", key="tag", value="note")
        # Small filters at a 5% target, so wasted probes are frequent enough for the interval to bite.
        cluster = LocalCluster(tmp_path / "fleet", nodes=2, capacity=1000, fpr=0.05,
                               extra_coordinator_args=["--auto-rebuild", "false"],
                               agents={"brinewick-cache": ["--store", redis_server.url()],
                                       "gullrock-ledger": ["--store", pg_url]})
        with cluster:
            for node_id in ("node-1", "node-2"):
                items = [storage_pb2.PutRequest(key=f"{node_id}:tally:{i}".encode(), value=b"laver 7 kg")
                         for i in range(KEYS_PER_STORE)]
                cluster.storage(node_id).BatchPut(storage_pb2.BatchPutRequest(items=items), timeout=30)
            # Written after the agents started: they arrive through the stores' feeds.
            redis_server.client().mset({f"cache:late:{i}".encode(): b"dulse" for i in range(100)})
            pg.execute("INSERT INTO harvest SELECT 'ledger:late-' || g, 'dulse' FROM generate_series(1, 100) g",
                       dbname="cooperative")
            redis_keys = [bytes(k) for k in redis_server.client().scan_iter(count=1000)]
            pg_keys = [r[0].encode() for r in pg.execute("SELECT tag FROM harvest", dbname="cooperative")]
            router = cluster.router()
            wait_until(lambda: not not_routed_to(router, redis_keys, "brinewick-cache")
                       and not not_routed_to(router, pg_keys, "gullrock-ledger"), 30,
                       message="every key of both stores routed to its agent")

            env = {**os.environ, "SHARDSIEVE_CONFIG": ""}
            env.pop("SHARDSIEVE_TOKEN", None)
            total = 4 * KEYS_PER_STORE + 200
            proc = subprocess.run(
                [sys.executable, "-m", "shardsieve.cli.main", "loadtest", "--coordinator",
                 cluster.coordinator_address, "--reuse", "--keys", str(total), "--count", "4000",
                 "--concurrency", "4", "--seed", "11", "--json"],
                capture_output=True, text=True, env=env, timeout=300)
            assert proc.returncode == 0, proc.stderr[-2000:]
            report = json.loads(proc.stdout)
    finally:
        redis_server.stop()
        pg.remove()

    assert report["reused"] == total                      # every store's keys, none on two stores
    assert set(report["predicted_fpr_per_node"]) == {"node-1", "node-2", "brinewick-cache", "gullrock-ledger"}
    assert report["false_negatives"] == 0 and report["errors"] == 0
    assert report["rebuilt_during_run"] == [] and report["stale_during_run"] == []
    assert report["interval"]["hit"]["inside"] is True, report["interval"]
    assert report["interval"]["miss"]["inside"] is True, report["interval"]
    assert report["wasted_probes_per_node"].get("brinewick-cache", 0) + \
        report["wasted_probes_per_node"].get("gullrock-ledger", 0) > 0    # the agents' filters were asked
