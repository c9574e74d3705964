"""The command line: ``simpower <command> ...``; one module per command (``cmd_*.py``)."""
