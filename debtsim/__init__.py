"""debtsim: credit-portfolio loss with default contagion between obligors.

Results are model estimates, not investment or regulatory advice.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("debtsim")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.1.0"

__all__ = ["__version__"]
