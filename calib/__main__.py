"""``python -m calib`` runs the command line."""

from calib.cli import main

if __name__ == "__main__":  # worker processes started by spawn re-import this module
    main()
