#!/usr/bin/env python3
"""`Client.assign` with 1 000 experiments held, as the Rust client's `cargo bench -p
apportion-client --bench assign` measures it: four arms (warm 0.5, cool 0.3, mono 0.15,
gold 0.05), units cycling through 4 096 ids. Offline (no Kafka), so only the request path counts.

    PYTHONPATH=clients/python/src python3 clients/python/benchmarks/assign.py
"""

import json
import platform
import timeit

from apportion_client import Client

client = Client("unused", clock=lambda: 1_000)
for e in range(1000):
    msg = {"experiment": f"experiment-{e}", "version": 1, "state": "learning", "published_at_ms": 1000,
           "weights": {"warm": 0.5, "cool": 0.3, "mono": 0.15, "gold": 0.05}}
    client.offer(f"experiment-{e}", json.dumps(msg).encode())
units = [f"user-{u:08}" for u in range(4096)]
state = {"i": 0}


def one() -> None:
    state["i"] = (state["i"] + 1) & 4095
    client.assign("experiment-517", units[state["i"]])


n = 100_000
best = min(timeit.repeat(one, number=n, repeat=5)) / n
print(f"assign, 1000 experiments, 4 arms: {best * 1e6:.2f} µs per call (best of 5 × {n}; Python {platform.python_version()})")
