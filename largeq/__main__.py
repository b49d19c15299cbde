import sys

from largeq.cli import main

sys.exit(main())
