"""``python -m hybrid``: the command line, for when the ``hybrid`` script is not on the PATH."""
from hybrid.cli import main

main()
