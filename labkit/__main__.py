"""``python -m labkit`` runs the ``labkit`` command."""

from labkit.cli.main import main

raise SystemExit(main())
