"""`python -m relay.cli VERB ...` is `rehear VERB ...`."""

import sys

from relay.cli import main

sys.exit(main())
