"""Command-line interface: thin shells over the library (see docs/cli.md)."""
