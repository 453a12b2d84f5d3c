"""Entry point for ``python -m engine``."""

import sys

from .cli import main

sys.exit(main())
