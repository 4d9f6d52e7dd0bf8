"""What Redis adds to a waited plan: the same plans sent alternately to two replicas.

Start two replicas at once on the same graph, one without and one with a shared store, e.g.::

    redis-server --port 6411 --save "" &
    dueroute serve --graph demo --workers 1 --port 18431 &
    DUEROUTE_REDIS_URL=redis://127.0.0.1:6411/0 dueroute serve --graph demo --workers 1 \\
        --port 18432 --policy-dir /tmp/p2 &
    flock /tmp/dueroute-timing.lock python scripts/redis_ab.py \\
        http://127.0.0.1:18431 http://127.0.0.1:18432 --pairs 1000

Every pair goes to both (the order alternates), so both see the same machine load. Prints, per
replica, the median client time, the median server time outside the search (Server-Timing
``total`` minus ``search``) and the median time to the 202 of a background plan, and the
median over pairs of the differences (B minus A), as JSON.
"""

from __future__ import annotations

import argparse
import json
import statistics
import time
from typing import Any

import httpx


def _timed_post(client: httpx.Client, body: dict[str, Any]) -> tuple[httpx.Response, float]:
    t0 = time.perf_counter()
    response = client.post("/v1/plans", json=body)
    return response, (time.perf_counter() - t0) * 1000.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("url_a", help="the replica without a shared store")
    parser.add_argument("url_b", help="the replica with DUEROUTE_REDIS_URL")
    parser.add_argument("--pairs", type=int, default=1000, help="waited plans per replica")
    parser.add_argument("--background", type=int, default=300, help="background plans each")
    parser.add_argument("--deadline-ms", type=int, default=20)
    args = parser.parse_args()
    clients = {"A": httpx.Client(base_url=args.url_a), "B": httpx.Client(base_url=args.url_b)}
    n_nodes = int(clients["A"].get("/readyz").json()["detail"]["nodes"])
    per_pair: dict[str, dict[int, tuple[float, float]]] = {"A": {}, "B": {}}
    background: dict[str, list[float]] = {"A": [], "B": []}
    for i in range(args.pairs + args.background):
        o, d = (i * 7919) % n_nodes, (i * 104729 + 17) % n_nodes
        body: dict[str, Any] = {
            "origin": {"node": o},
            "destination": {"node": d},
            "deadline_ms": args.deadline_ms,
        }
        waited = i < args.pairs
        if not waited:
            body["wait"] = False
        for name in ("A", "B") if i % 2 == 0 else ("B", "A"):
            response, client_ms = _timed_post(clients[name], body)
            if waited and response.status_code == 200:
                timing = {
                    k: float(v)
                    for k, v in (
                        p.split(";dur=") for p in response.headers["server-timing"].split(", ")
                    )
                }
                per_pair[name][i] = (client_ms, timing["total"] - timing["search"])
            elif not waited and response.status_code == 202:
                background[name].append(client_ms)
        if not waited:
            time.sleep(0.05)  # background plans: one at a time, so none is shed
    both = sorted(set(per_pair["A"]) & set(per_pair["B"]))
    out: dict[str, Any] = {}
    for name in ("A", "B"):
        rows = per_pair[name].values()
        out[name] = {
            "waited": len(rows),
            "median_client_ms": round(statistics.median(r[0] for r in rows), 3),
            "median_server_outside_search_ms": round(statistics.median(r[1] for r in rows), 3),
            "median_background_202_ms": round(statistics.median(background[name]), 3),
        }
    out["paired_median_b_minus_a_ms"] = {
        what: round(statistics.median(per_pair["B"][p][j] - per_pair["A"][p][j] for p in both), 3)
        for j, what in enumerate(("client", "server_outside_search"))
    }
    print(json.dumps(out))


if __name__ == "__main__":
    main()
