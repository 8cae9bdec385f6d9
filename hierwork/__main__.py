"""``python -m hierwork`` runs the command line."""
from hierwork.cli import main

raise SystemExit(main())
