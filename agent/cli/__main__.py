"""`python -m agent.cli ...` runs the `watchkeep` command."""

import sys

from agent.cli.main import main

sys.exit(main())
