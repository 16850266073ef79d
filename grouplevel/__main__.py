"""``python -m grouplevel`` runs the command line."""

import sys

from grouplevel.cli.commands import main

sys.exit(main())
