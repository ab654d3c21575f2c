"""``python -m pipeline`` is the ``gapline`` command."""

from pipeline.cli import main

raise SystemExit(main())
