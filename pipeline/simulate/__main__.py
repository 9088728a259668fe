"""``python -m pipeline.simulate CONFIG``: write a synthetic night."""

import sys

from pipeline.simulate import main

if __name__ == "__main__":
    sys.exit(main())
