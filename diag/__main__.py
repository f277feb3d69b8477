"""`python -m diag` runs the command line."""

import sys

from diag.cli import main

sys.exit(main())
