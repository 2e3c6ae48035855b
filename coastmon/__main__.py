"""Allow ``python -m coastmon``."""

from coastmon.cli import main

raise SystemExit(main())
