"""Example line files and scenarios of spanwatch, set in the fictional plant Quillmere Works (line Q2).

Installed as the data package ``spanwatch.examples``; find the files with
``spanwatch.monitor.examples.example_path(name)`` or list them with ``spanwatch examples``.
This file makes the folder a regular package, so ``importlib.resources.files("spanwatch.examples")``
is a folder on disk in a wheel install and in an editable install alike.
"""
