"""``python -m gasrules``: the same command as ``gasrules``."""

import sys

from gasrules.cli import main

sys.exit(main())
