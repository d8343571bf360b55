"""``python -m inventory`` runs the command line."""

from inventory.cli import main

if __name__ == "__main__":
    raise SystemExit(main())
