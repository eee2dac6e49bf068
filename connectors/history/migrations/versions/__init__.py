"""The revisions, oldest first: ``0001`` creates the history tables; new tables come as ``0002``, ...."""
