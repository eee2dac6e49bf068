"""The simulated line: a physical model of a configured line with faults from a scenario file."""

from spanwatch.monitor.simline.model import SimulatedLine
from spanwatch.monitor.simline.scenario import FAULT_KINDS, Scenario, load_scenario

__all__ = ["FAULT_KINDS", "Scenario", "SimulatedLine", "load_scenario"]
