import sys

from plateaufit.cli import main

sys.exit(main())
