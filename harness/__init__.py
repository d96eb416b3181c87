"""stageproof: automated bench test of amplifier boards.

The layers and what each may import: README.md, "Layout of the code" (enforced by
import-linter, contracts in pyproject.toml).
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("stageproof")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+src"

__all__ = ["__version__"]
