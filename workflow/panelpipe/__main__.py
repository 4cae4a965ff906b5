"""``python -m panelpipe`` is the ``panelpipe`` command."""

from .cli import main

raise SystemExit(main())
