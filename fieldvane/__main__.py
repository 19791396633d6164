"""Allow `python -m fieldvane`."""

from fieldvane.io.cli import main

raise SystemExit(main())
