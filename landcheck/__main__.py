"""``python -m landcheck`` runs the command line."""

from .cli.main import cli

if __name__ == "__main__":
    cli()
