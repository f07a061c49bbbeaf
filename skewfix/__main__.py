"""``python -m skewfix`` runs the command line."""

from skewfix.cli import main

raise SystemExit(main())
