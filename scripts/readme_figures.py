"""`python scripts/readme_figures.py [key=value ...]`: the same as `plantation readme-figures [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["readme-figures", *sys.argv[1:]]))
