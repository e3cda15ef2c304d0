"""The package version, apart from the package so that no module imports the package for it."""

__version__ = "0.1.0"
