"""Sample sources: the simulated line, recordings, and (later) live OPC UA and MQTT connectors.

Every source hands the monitor :class:`connectors.base.SampleBatch` objects: tag
samples with their source timestamp, raw value in the tag's configured unit, and a
quality code.
"""
