"""``python -m harness`` is the ``harness`` command."""

from harness.cli import main

raise SystemExit(main())
