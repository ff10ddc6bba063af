"""``python -m fieldprop`` runs the command-line interface."""

import sys

from fieldprop.cli import main

sys.exit(main())
