"""``python -m livedyn``: the same command as ``livedyn``."""
import sys

from .cli import main

sys.exit(main())
