"""Allow ``python -m coastmon``."""

from coastmon.cli import main

if __name__ == "__main__":  # not when a reader process of the pass re-imports this module
    raise SystemExit(main())
