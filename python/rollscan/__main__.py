"""``python -m rollscan ...`` runs the ``rollscan`` command."""

import sys

from rollscan.cli import main

sys.exit(main())
