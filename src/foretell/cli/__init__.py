"""The ``foretell`` command: parse, run a step, write, print."""

from .main import main

__all__ = ["main"]
