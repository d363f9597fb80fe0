"""``python -m quakefolio.pipeline`` is the ``quakefolio`` command."""
import sys

from quakefolio.pipeline.cli import command

sys.exit(command())
