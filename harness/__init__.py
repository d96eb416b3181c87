"""stageproof: automated bench test of amplifier boards.

Layers (imports point down only)::

    cli -> run -> {model, measure, instruments, store}
    sim -> instruments (profiles, SCPI codecs) + its own physics
    model, measure: pure numerics, no I/O

``harness.errors`` and ``harness.values`` are shared by every layer.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("stageproof")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+src"

__all__ = ["__version__"]
