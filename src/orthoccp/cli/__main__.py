"""``python -m orthoccp.cli``: the command line."""

from . import main

raise SystemExit(main())
