"""``python -m okdecode`` runs the command line."""

from okdecode.cli import main

if __name__ == "__main__":
    main()
