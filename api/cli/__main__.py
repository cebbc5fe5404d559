"""`python -m api.cli`: the same as the `hunchwise` command."""

import sys

from . import main

sys.exit(main())
