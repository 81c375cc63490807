"""``python -m monitor`` runs the command line."""

import sys

from monitor.cli import main

sys.exit(main())
