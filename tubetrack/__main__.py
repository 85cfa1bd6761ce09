"""``python -m tubetrack`` runs the command-line interface."""

from tubetrack.cli import app

if __name__ == "__main__":  # pragma: no cover
    app()
