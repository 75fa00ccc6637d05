"""The ``hatkernels`` command (placeholder until its subcommands land)."""

import sys


def main(argv=None):
    print("hatkernels: no subcommands yet", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
