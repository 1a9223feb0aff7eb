import sys

from speedbench.cli import main

sys.exit(main())
