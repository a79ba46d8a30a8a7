"""The ``supportgen`` command: argument parsing and exit codes only, no logic of its own."""
