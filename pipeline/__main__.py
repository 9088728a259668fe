"""``python -m pipeline``: the same as the ``zdrift`` command."""

from pipeline.cli import run

if __name__ == "__main__":
    run()
