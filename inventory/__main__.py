"""``python -m inventory`` runs the command line."""

from .cli import main

raise SystemExit(main())
