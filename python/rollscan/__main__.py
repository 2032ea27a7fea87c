"""``python -m rollscan ...``: the same as the ``rollscan`` command."""

from rollscan.cli import main

raise SystemExit(main())
