import sys

from tba.cli import main

sys.exit(main())
