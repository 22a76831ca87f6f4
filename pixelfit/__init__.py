"""pixelfit: how few pixels does a detector need? Train a ladder of rules by size and measure."""

from importlib import metadata as _metadata

try:
    __version__ = _metadata.version("pixelfit")
except _metadata.PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0.0.0+unknown"

from pixelfit.errors import DatasetError, PixelfitError, RuleFileError, TrainingError

__all__ = ["__version__", "PixelfitError", "DatasetError", "RuleFileError", "TrainingError"]
