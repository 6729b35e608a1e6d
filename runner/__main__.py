"""``python -m runner`` is the ``castgrid`` command."""

from .cli import main

raise SystemExit(main())
