"""``python -m trimtab``: the same as the ``trimtab`` command."""

from trimtab.cli import main

raise SystemExit(main())
