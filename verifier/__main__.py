"""``python -m verifier`` runs the chainproof command line."""

import sys

from .cli import main

sys.exit(main())
