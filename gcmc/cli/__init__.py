"""The ``gcmc`` command line, one module per sub-command; ``gcmc.cli.app`` builds the parser.
The top of the layer stack: nothing in the package imports it."""

from gcmc.cli.app import main

__all__ = ["main"]
