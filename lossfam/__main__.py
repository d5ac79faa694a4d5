"""``python -m lossfam ...`` runs the ``lossfam`` command line (lossfam.cli)."""
from .cli import main

raise SystemExit(main())
