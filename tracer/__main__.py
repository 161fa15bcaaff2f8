"""python -m tracer: the same as the `tracer` command."""
import sys

from tracer.cli import main

sys.exit(main())
