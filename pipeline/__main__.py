"""`python -m pipeline` is the `edgeproof` command."""

import sys

from .cli import main

sys.exit(main())
