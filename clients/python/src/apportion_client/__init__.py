"""Python client of the apportion sidecar.

Follows the weights topic, assigns units to arms by weighted rendezvous hashing (with fallbacks
when weights are missing, stale or retired), and writes impression and reward events to the
sidecar's input topic. ``confluent_kafka`` is imported only when a Kafka object is created, so
``apportion_client.hashing`` and ``apportion_client.table`` work with the standard library alone.
"""

from .client import COUNTERS, Client, Fallback, Unassignable
from .events import Assignment, Impression
from .hashing import arm_seed, assign_arm, choose, unit_key
from .table import Held, WeightsTable

__all__ = [
    "COUNTERS",
    "Assignment",
    "Client",
    "Fallback",
    "Held",
    "Impression",
    "Unassignable",
    "WeightsTable",
    "arm_seed",
    "assign_arm",
    "choose",
    "unit_key",
]

__version__ = "0.1.0"
