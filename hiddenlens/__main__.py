"""``python -m hiddenlens``: the same command as the ``hiddenlens`` console script."""

import sys

from ._faces.cli import main

if __name__ == "__main__":
    sys.exit(main())
