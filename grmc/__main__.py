"""``python -m grmc``: the command line."""

from .cli import main

raise SystemExit(main())
