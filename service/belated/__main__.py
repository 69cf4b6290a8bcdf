"""`python -m belated`."""

from belated.cli import main

main()
