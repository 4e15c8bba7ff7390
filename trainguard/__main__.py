"""`python -m trainguard ...`: the same as the `trainguard` command."""

import sys

from .skins.cli import main

sys.exit(main())
