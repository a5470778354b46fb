"""ebullio's monitor: physics, the model, logs and the command line."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("ebullio")
except PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0.0.0+source"
