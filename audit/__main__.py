"""``python -m audit`` runs the command line."""

from audit.cli import main

raise SystemExit(main())
