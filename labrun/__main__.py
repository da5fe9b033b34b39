"""Allow ``python -m labrun``."""

from labrun.cli import main

raise SystemExit(main())
