"""The simulated line served over OPC UA, as a PLC would serve it (demo, tests, benchmarks).

:class:`SimLineServer` is the adapter's :class:`~spanwatch.connectors.opcua_server.FeedServer`
fed by a :class:`~spanwatch.monitor.simline.SimulatedLine`: one Double variable per config tag
(node id ``ns=2;s=<tag name>``), a Boolean for a plain-number tag with range [0, 1] (a flag such
as ``q2.rewind.core_change``), paced by the tags' sample periods. :func:`opcua_line_config` turns
the example line into the same line read through an OPC UA source ``[sources.plc]`` with the
``address`` of every tag (what ``config/quillmere-q2-opcua.toml`` holds).
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path
from typing import Any

from spanwatch.connectors.opcua_server import FeedServer
from spanwatch.monitor import units as U
from spanwatch.monitor.config import parse_config
from spanwatch.monitor.examples import example_path
from spanwatch.monitor.line import build_line
from spanwatch.monitor.simline import SimulatedLine


class SimLineServer(FeedServer):
    """A :class:`FeedServer` serving a simulated line; keyword arguments as for FeedServer."""

    def __init__(self, sim: SimulatedLine, **options: Any) -> None:
        tags = sim.line.tags
        boolean = {n for n, t in tags.items() if t.kind is U.DIMENSIONLESS and (t.low, t.high) == (0.0, 1.0)}
        super().__init__(sim, sample_periods={n: t.sample_period for n, t in tags.items()}, boolean_tags=boolean,
                         **options)


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    text = str(value).replace("\\", "\\\\").replace('"', '\\"')
    return f'"{text}"'


_TAG_HEADER = re.compile(r'^\[tags\."(?P<name>[^"]+)"\]\s*$')


def opcua_line_config(endpoint: str, *, base: str | Path | None = None, source: str = "plc",
                      namespace_index: int = 2, publishing_interval: str = "100 ms", queue_size: int = 50,
                      **source_options: Any) -> str:
    """The example line (``base``, by default config/quillmere-q2.toml) read from an OPC UA server.

    Adds ``[sources.<source>]`` (``kind = "opcua"``, the ``endpoint``, publishing interval, queue size,
    watchdog and reconnect settings, and any ``source_options`` such as ``username``, ``password``,
    ``security_policy``) and gives every tag ``source = "<source>"`` and
    ``address = "ns=<namespace_index>;s=<tag name>"``, the node ids :class:`SimLineServer` serves.
    Everything else is the base file, verbatim. The result is validated before it is returned.
    """
    text = Path(base if base is not None else example_path("quillmere-q2.toml")).read_text(encoding="utf-8")
    options: dict[str, Any] = {
        "kind": "opcua", "endpoint": endpoint, "security_policy": "None", "security_mode": "None",
        "publishing_interval": publishing_interval, "queue_size": queue_size, "watchdog_interval": "1 s",
        "timeout": "4 s", "reconnect_min": "0.5 s", "reconnect_max": "30 s"}
    options.update(source_options)
    notes = {
        "publishing_interval": "one batch of changes per interval",
        "queue_size": "per tag on the server: 5 samples per publish at 50 Hz, room for jitter",
        "watchdog_interval": "server clock read and subscription check; loss seen within a few seconds",
    }
    block = ["# --- live source: the line's OPC UA server ---------------------------------------------------",
             "# Every tag below names this source and gives its node id as address.", "",
             f"[sources.{source}]"]
    for key, value in options.items():
        line = f"{key} = {_toml_value(value)}"
        block.append(f"{line:<40} # {notes[key]}" if key in notes else line)
    block.append("")
    out: list[str] = [
        "# Line Q2 read live over OPC UA: the example line (quillmere-q2.toml) with an OPC UA source.",
        f"# Made by spanwatch.monitor.simserve.opcua_line_config; every tag has source = \"{source}\" and the "
        "node id", "# the simulated line's server gives it (SimLineServer: ns=2;s=<tag name>).", ""]
    lines = text.splitlines()
    first_tag = next((k for k, ln in enumerate(lines) if _TAG_HEADER.match(ln)), len(lines))
    insert_at = next((k for k in range(first_tag) if lines[k].startswith("# --- tags")), first_tag)
    for k, ln in enumerate(lines):
        if k == insert_at:
            out.extend(block)
        out.append(ln)
        m = _TAG_HEADER.match(ln)
        if m:
            out.append(f"source = {_toml_value(source)}")
            address = f"ns={namespace_index};s={m.group('name')}"
            out.append(f"address = {_toml_value(address)}")
    if insert_at >= len(lines):
        out.extend(block)
    result = "\n".join(out) + "\n"
    build_line(parse_config(tomllib.loads(result), "<opcua_line_config>"), "<opcua_line_config>")
    return result
