"""``python -m calib`` runs the command line."""

from calib.cli import main

main()
