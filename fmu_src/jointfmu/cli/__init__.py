"""The ``jointfmu`` command line: :func:`main` parses and runs one command."""
from .main import main, run

__all__ = ["main", "run"]
