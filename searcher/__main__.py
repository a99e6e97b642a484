import sys

from searcher.cli.main import main

sys.exit(main())
