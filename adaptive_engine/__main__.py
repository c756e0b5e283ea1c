"""``python3 -m adaptive_engine ...`` runs the command line (same as ``adaptive-engine``)."""

from .cli import main

if __name__ == "__main__":
    main(prog_name="adaptive-engine")
