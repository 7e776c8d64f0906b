"""`python -m pipeline` is the `edgeproof` command."""

import sys

from .cli import program

sys.exit(program())
