"""Bad input, counted: counts and references per tag and reason, one rate-limited log line with a hint."""

from __future__ import annotations

import logging

from spanwatch.monitor.inputs import InputStats


def test_counts_refs_and_one_log_line_per_reason_within_the_interval(caplog):
    stats = InputStats(keep_refs=3, log_every=3600.0)
    with caplog.at_level(logging.WARNING, logger="spanwatch.inputs"):
        stats.add("q2.s2.tension", "late", refs=[59, 60, 61, 62])
        stats.add("q2.s5.tension", "late", refs=[70])
        stats.add("q2.s5.tension", "bad quality", count=2)
    assert stats.total("late") == 5 and stats.total() == 7
    assert stats.refs[("q2.s2.tension", "late")] == [59, 60, 61]
    lines = [r.getMessage() for r in caplog.records]
    assert len(lines) == 2, lines  # one per reason; the second late batch waits for the interval
    late = next(m for m in lines if "late" in m)
    assert "4 sample(s) with late" in late and "reference 59" in late and "[daemon] latency" in late
    assert "latency" not in next(m for m in lines if "bad quality" in m)
