"""``python -m desktop [FILE]``: the same as the ``ballast`` command."""
import sys

from .app import main

sys.exit(main())
