"""`python -m calibrate ...`: the same command line as the `calibrate` script."""

import sys

from calibrate.cli import main

sys.exit(main())
