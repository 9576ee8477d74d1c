"""The package version, in one place (the package, the CLI and the report read it from here)."""

__version__ = "0.1.0"
