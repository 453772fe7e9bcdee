"""``python -m benchctl`` entry point."""

from benchctl.cli import main

raise SystemExit(main())
