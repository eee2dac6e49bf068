"""spanwatch: a streaming monitor for web-handling lines (advisory only; not a safety function).

This file is installed as ``spanwatch/__init__.py``. The three folders of the
repository are installed beneath it (see ``[tool.setuptools]`` in pyproject.toml):

* ``spanwatch.rules`` (folder ``rules/``): the core — sample and result types,
  checks and their physics, alarm state machines. It imports no adapter.
* ``spanwatch.connectors`` (folder ``connectors/``): adapters — OPC UA, MQTT,
  recordings, the history store. They import only ``spanwatch.rules``.
* ``spanwatch.monitor`` (folder ``monitor/``): the application — config, line
  model, pipeline, daemon, CLI, demo, replay — which wires the other two.

The example line files and scenarios ship as ``spanwatch.examples`` (folder ``config/``).
"""

__version__ = "0.2.0"

import os as _os

# Apache Arrow (recordings) allocates through the C library's malloc unless the user chose otherwise: its default
# allocator reserves a 1 GiB arena of address space up front, which a process run under an address-space limit
# (ulimit -v, RLIMIT_AS) cannot afford, for no measurable gain in reading recordings (docs/benchmarks.md).
_os.environ.setdefault("ARROW_DEFAULT_MEMORY_POOL", "system")
