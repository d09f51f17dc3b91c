"""`python -m gradcheck_kit check ...`: the command line."""
import sys

from .cli import main

sys.exit(main())
