"""Allow ``python -m spatial_ev``."""

import sys

from spatial_ev.cli.main import main

sys.exit(main())
