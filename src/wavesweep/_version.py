"""The package version, in a module of its own so that any layer can name it
without importing the package's public surface (``wavesweep/__init__.py``)."""
__version__ = "0.1.0"
