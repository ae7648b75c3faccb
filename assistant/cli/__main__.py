"""``python -m assistant.cli``: the same as the ``mfma`` command."""

import sys

from assistant.cli import main

sys.exit(main())
