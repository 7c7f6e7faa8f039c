"""The version of corpuscle (one place, read by the package, the CLI and every report writer)."""
__version__ = "0.1.0"
