"""``python -m grouplevel`` runs the command line."""

import sys

from grouplevel.cli import main

sys.exit(main())
