"""``python -m pipeline`` runs the kaledger command line."""

from pipeline.cli import main

raise SystemExit(main())
