"""``/metrics``: Prometheus text from what Redis knows, never job contents.

:class:`StoreCollector` reads, at each scrape, the job counts by state, the
depth of each queue and the solve-seconds and iteration histograms that the
workers record when a job is done.  The registry is per app (tests build many
apps), and the collector answers ``fixq_redis_up 0`` instead of failing when
Redis is away.
"""

from __future__ import annotations

from collections.abc import Iterator

import redis
from prometheus_client import CollectorRegistry, ProcessCollector
from prometheus_client.core import GaugeMetricFamily, HistogramMetricFamily, Metric

from service.queue import queue_name
from service.store import JobStore

__all__ = ["StoreCollector", "build_registry"]


class StoreCollector:
    """A Prometheus collector over one :class:`~service.store.JobStore`."""

    def __init__(self, store: JobStore) -> None:
        self.store = store

    def collect(self) -> Iterator[Metric]:
        """The metric families of one scrape (a handful of Redis round trips)."""
        up = GaugeMetricFamily("fixq_redis_up", "1 when the job store (Redis) answered this scrape, else 0.")
        try:
            counts = self.store.counts_by_state()
            depths = self.store.queue_depths()
            histograms = self.store.solve_histograms()
        except redis.RedisError:
            up.add_metric([], 0)
            yield up
            return
        up.add_metric([], 1)
        yield up
        jobs = GaugeMetricFamily("fixq_jobs", "Jobs known to fixq, by state.", labels=["state"])
        for state, count in counts.items():
            jobs.add_metric([state], count)
        yield jobs
        queued = GaugeMetricFamily("fixq_queue_depth", "Executions waiting in each RQ queue.", labels=["queue"])
        for priority, depth in depths.items():
            queued.add_metric([queue_name(priority)], depth)
        yield queued
        for name, unit_help in (
            ("seconds", "Solve time of finished jobs, in seconds."),
            ("iterations", "Iterations of finished jobs."),
        ):
            histogram = histograms[name]
            family = HistogramMetricFamily(f"fixq_solve_{name}", unit_help)
            family.add_metric(
                [],
                buckets=[(_bound(upper), count) for upper, count in histogram["buckets"]],
                sum_value=histogram["sum"],
            )
            yield family


def _bound(upper: float) -> str:
    return "+Inf" if upper == float("inf") else repr(float(upper))


def build_registry(store: JobStore) -> CollectorRegistry:
    """A registry holding the store collector and this process's CPU and memory."""
    registry = CollectorRegistry()
    registry.register(StoreCollector(store))
    ProcessCollector(namespace="fixq_api", registry=registry)
    return registry
