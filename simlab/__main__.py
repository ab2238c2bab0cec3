"""Entry point for ``python -m simlab``."""

from .cli import main

raise SystemExit(main())
