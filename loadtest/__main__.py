"""``python -m loadtest``: see :mod:`loadtest.run`."""

from loadtest.run import main

raise SystemExit(main())
