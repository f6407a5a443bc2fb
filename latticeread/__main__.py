"""Allow ``python -m latticeread``."""

from latticeread.cli import main

if __name__ == "__main__":
    raise SystemExit(main())
