import os
import sys

try:
    from .cli.program import entry
except KeyboardInterrupt:  # Ctrl-C while the command line itself is being loaded
    sys.stderr.write("interrupted; no output was written\n")
    sys.stderr.flush()
    os._exit(130)

entry()
