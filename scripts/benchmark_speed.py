"""`python scripts/benchmark_speed.py [key=value ...]`: the same as `plantation benchmark-speed [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["benchmark-speed", *sys.argv[1:]]))
