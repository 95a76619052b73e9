"""``python -m harness`` is the ``harness`` command."""

from harness.cli.main import main

raise SystemExit(main())
