"""``python -m harness`` is the ``harness`` command."""

try:
    from harness.cli.main import main

    status = main()
except KeyboardInterrupt:  # a Ctrl-C while Python and JAX start, before a command can answer it
    from harness.core import interrupts

    interrupts.report("harness: interrupted; nothing half-written was left behind")
    status = interrupts.EXIT_STATUS
raise SystemExit(status)
