"""``python -m runner`` is the ``castgrid`` command."""

from runner.cli import main

raise SystemExit(main())
