"""``python -m inventory`` runs the command line."""

from inventory.cli import main

raise SystemExit(main())
