"""``python -m liveshape`` runs the command line."""

import sys

from liveshape.cli import main

sys.exit(main())
