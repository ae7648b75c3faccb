"""``python -m assistant`` is the same as ``mfma``."""

import sys

from assistant.cli import main

sys.exit(main())
