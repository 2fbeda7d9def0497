"""``python -m analogs`` runs the command line."""

import sys

from analogs.cli import main

sys.exit(main())
