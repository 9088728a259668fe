"""``python -m pipeline``: the same as the ``zdrift`` command."""

from pipeline.cli import main

if __name__ == "__main__":
    raise SystemExit(main())
