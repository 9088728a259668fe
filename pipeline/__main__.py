"""``python -m pipeline``: the same as the ``zdrift`` command."""

from pipeline.cli import main

raise SystemExit(main())
