"""The package version: written here only (``setup.cfg`` reads it, ``sim.__version__`` hands it on)."""

__version__ = "0.1.0"
