"""``python -m landcheck`` runs the command line."""

import sys

try:
    from .cli.main import main
except KeyboardInterrupt:  # Ctrl-C while starting up: nothing was written yet (docs/cli.md, exit 130)
    sys.exit(130)

if __name__ == "__main__":
    main()
