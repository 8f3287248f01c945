"""Allow ``python -m spatial_ev``."""

import sys

from .cli import main

sys.exit(main())
