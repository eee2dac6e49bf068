"""Adapters: OPC UA, MQTT, recordings and the history store. They import only :mod:`spanwatch.rules`.

Every source hands the application :class:`spanwatch.rules.samples.SampleBatch` objects: tag
samples with their source timestamp, raw value in the tag's configured unit, and a quality code.
"""
