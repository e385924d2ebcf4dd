"""`python -m codegen.cli`: the pdgc command."""

import sys

from codegen.cli import main

sys.exit(main())
