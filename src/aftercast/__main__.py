"""`python -m aftercast` runs the command line."""

from aftercast.cli import main

raise SystemExit(main())
