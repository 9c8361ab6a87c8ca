"""`python -m rowcast` runs the command line."""

from rowcast.cli import main

main()
