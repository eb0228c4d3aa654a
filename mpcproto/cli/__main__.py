"""``python -m mpcproto.cli``: the ``mpcproto`` command."""

import sys

from .parser import main

sys.exit(main())
