"""``python -m service``: the ``quaver`` console script (see service.cli).

Holds no logic of its own."""

from .cli import main

raise SystemExit(main())
