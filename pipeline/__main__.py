"""`python -m pipeline` runs the formgate command line."""

import sys

from pipeline.cli.main import main

sys.exit(main())
