"""The core: sample and result types, checks and their physics, alarm state machines. Imports no adapter."""
