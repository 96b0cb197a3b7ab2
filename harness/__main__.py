"""``python -m harness`` runs the command line."""

import sys

from harness.cli import main

sys.exit(main())
