"""``python -m hatkernels.cli``: the ``hatkernels`` command."""

import sys

from hatkernels.cli import main

if __name__ == "__main__":  # importing this module (doctest collection) runs nothing
    sys.exit(main())
