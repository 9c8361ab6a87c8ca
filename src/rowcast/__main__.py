"""`python -m rowcast` runs the command line."""

from rowcast.launch import main

main()
