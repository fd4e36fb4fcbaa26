"""ganlet.compile: the workstation half. data -> train -> distil -> quantise -> export -> pack."""

from ganlet.runtime import __version__

__all__ = ["__version__"]
