"""`python -m runtime.cli`: the `corral` command."""

import sys

from runtime.cli import main

sys.exit(main())
