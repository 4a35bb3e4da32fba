"""``python -m sedtemp``: the same as the ``sedtemp`` command."""

import sys

from .cli import main

__all__: list[str] = []

if __name__ == "__main__":
    sys.exit(main())
