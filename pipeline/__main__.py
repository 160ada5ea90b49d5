"""`python -m pipeline` runs the formgate command line."""

import sys

from pipeline.cli import main

sys.exit(main())
