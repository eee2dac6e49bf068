"""The application: config, line model, pipeline, daemon, CLI, demo and replay; wires rules and connectors."""
