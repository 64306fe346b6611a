"""``python -m pcapipe`` is the ``pcapipe`` command."""

from .cli import main

raise SystemExit(main())
