"""Command-line layer of supportgen (installed as the ``supportgen`` command)."""
