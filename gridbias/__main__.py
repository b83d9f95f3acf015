"""``python -m gridbias``: the same command as ``gridbias``."""

from .cli import main

raise SystemExit(main())
