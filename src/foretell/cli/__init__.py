"""The ``foretell`` command: parse, run a step, write, print (entry point ``foretell.cli:main``).

Importing it loads only the argument handling; each subcommand imports the
library parts it runs.
"""

from .main import main

__all__ = ["main"]
