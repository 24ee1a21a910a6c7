"""Allow ``python -m agent``."""

import sys

from agent.cli import main

sys.exit(main())
