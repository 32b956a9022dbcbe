"""`python -m benchharness` runs the command line."""

from benchharness.cli import main

raise SystemExit(main())
