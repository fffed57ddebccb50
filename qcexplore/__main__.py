"""``python -m qcexplore``: the command line."""

from qcexplore.cli import main

raise SystemExit(main())
