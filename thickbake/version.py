"""The package version, in a module of its own so that every layer can read it without importing the
public facade (``thickbake/__init__.py``), which sits above them all."""

__version__ = "0.1.0"
