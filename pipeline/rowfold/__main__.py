"""Allow ``python -m rowfold``."""

import sys

from rowfold.cli import main

sys.exit(main())
