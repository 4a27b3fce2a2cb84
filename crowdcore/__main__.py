"""`python -m crowdcore ...` runs the same command line as the `crowdcore` console command."""
from .cli import main

raise SystemExit(main())
