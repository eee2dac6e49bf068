"""Prometheus metrics of the daemon, read from its state at scrape time (prometheus-client)."""

from __future__ import annotations

from collections.abc import Iterator
from typing import TYPE_CHECKING, Any

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, SummaryMetricFamily
from spanwatch.monitor.schema import PRIORITIES
from spanwatch.rules.lifecycle import AlarmState

if TYPE_CHECKING:
    from spanwatch.monitor.daemon import Daemon


class DaemonCollector:
    """Prometheus collector that reads the daemon's state at scrape time."""

    def __init__(self, daemon: Daemon) -> None:
        self.d = daemon

    def collect(self) -> Iterator[Any]:
        d = self.d
        samples = CounterMetricFamily("spanwatch_samples_in", "Samples received, by source", labels=["source"])
        up = GaugeMetricFamily("spanwatch_connector_up", "1 when the source is connected", labels=["source"])
        reconnects = CounterMetricFamily("spanwatch_connector_reconnects", "Reconnections", labels=["source"])
        depth = GaugeMetricFamily("spanwatch_queue_depth", "Samples waiting in the connector queue",
                                  labels=["source"])
        overflow = CounterMetricFamily("spanwatch_queue_overflow", "Queue overflow events", labels=["source"])
        malformed = CounterMetricFamily("spanwatch_malformed_messages", "Malformed messages", labels=["source"])
        lost = CounterMetricFamily("spanwatch_samples_lost", "Messages lost before they arrived (dropped by a "
                                   "broker), by how it was seen: sequence or time gap", labels=["source", "how"])
        restarts = CounterMetricFamily("spanwatch_publisher_restarts", "Sequence numbers that started again",
                                       labels=["source"])
        for c in d.connectors:
            samples.add_metric([c.name], c.stats.samples_in)
            up.add_metric([c.name], 1.0 if c.state == "connected" else 0.0)
            reconnects.add_metric([c.name], c.stats.reconnects)
            depth.add_metric([c.name], c.stats.queue_depth)
            overflow.add_metric([c.name], c.stats.overflow)
            malformed.add_metric([c.name], c.stats.malformed_total)
            for how, n in dict(c.stats.lost).items():
                lost.add_metric([c.name, how], n)
            restarts.add_metric([c.name], c.stats.publisher_restarts)
        yield from (samples, up, reconnects, depth, overflow, malformed, lost, restarts)
        evals = SummaryMetricFamily("spanwatch_check_evaluation_seconds", "Time per tick spent in the pipeline",
                                    count_value=d.stats.ticks, sum_value=d.stats.eval_seconds)
        yield evals
        frames = CounterMetricFamily("spanwatch_frames", "Frames computed")
        frames.add_metric([], d.pipe.frames)
        yield frames
        lat = GaugeMetricFamily("spanwatch_frame_latency_seconds", "How far behind the clock frames are computed")
        lat.add_metric([], d.frame_latency)
        yield lat
        active = GaugeMetricFamily("spanwatch_active_alarms", "Active alarms by priority", labels=["priority"])
        counts = dict.fromkeys(PRIORITIES, 0)
        for p in d.pipe.engine.active():
            counts[p.priority] = counts.get(p.priority, 0) + 1
        for prio, n in counts.items():
            active.add_metric([prio], n)
        yield active
        states = GaugeMetricFamily("spanwatch_alarm_states", "Alarm points by lifecycle state (ISA-18.2)",
                                   labels=["state"])
        by_state = {s.value: 0 for s in AlarmState}
        for rec in list(d.pipe.lifecycle.records.values()):
            by_state[rec.state.value] += 1
        for state, n in by_state.items():
            states.add_metric([state], n)
        yield states
        trans = CounterMetricFamily("spanwatch_alarm_transitions", "Alarm transitions", labels=["event"])
        for ev, n in d.stats.transitions.items():
            trans.add_metric([ev], n)
        yield trans
        issues = CounterMetricFamily("spanwatch_input_issues", "Samples refused or flagged", labels=["reason"])
        by_reason: dict[str, int] = {}
        for r in d.pipe.inputs.rows():
            by_reason[str(r["reason"])] = by_reason.get(str(r["reason"]), 0) + int(r["count"])  # type: ignore[call-overload]
        for reason, n in by_reason.items():
            issues.add_metric([reason], n)
        yield issues
