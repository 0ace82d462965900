"""``python -m jointfmu``: the command line (see :mod:`jointfmu.cli`)."""
from .cli.main import run

run()
