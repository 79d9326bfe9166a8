"""`python -m ivdossier.cli` runs the command line."""

from ivdossier.cli.app import main

main()
