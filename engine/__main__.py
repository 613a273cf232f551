import os
import sys

from .jobs.cli import EXIT_INTERRUPTED, EXIT_TERMINATED, main

code = main()
if code in (EXIT_INTERRUPTED, EXIT_TERMINATED):
    # An interrupted run has removed its temporary files; skip the interpreter's
    # clean-up, where objects of an interrupted native computation may crash it.
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)
sys.exit(code)
