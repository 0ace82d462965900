"""Parameter sets: the ``jointfmu-params/1`` file, its checks and its frozen dataclasses.

The lowest layer of jointfmu besides :mod:`jointfmu.errors` and :mod:`jointfmu.fileio`: it imports
nothing else of the package.
"""
from . import parameter_set as _parameter_set
from .parameter_set import *  # noqa: F401,F403 - exactly parameter_set.__all__

__all__ = list(_parameter_set.__all__)
