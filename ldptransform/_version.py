"""The package version (one place: the package, the manifest and the command line read it here)."""

__version__ = "0.1.0"
