"""``python -m spanwatch``: the same as the ``spanwatch`` command."""

from spanwatch.monitor.cli import main

main()
