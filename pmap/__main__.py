"""``python -m pmap`` runs the pmap command."""

from .cli import main

raise SystemExit(main())
