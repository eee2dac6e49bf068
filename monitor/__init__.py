"""spanwatch monitor: alignment, line state, pipeline, alarms, history and the CLI."""

__version__ = "0.1.0"
